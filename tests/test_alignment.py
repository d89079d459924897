"""Neighbour alignment for multi-frame models (``inference/images/alignment.py``): the optical flow recovers a known
sub-pixel translation, aligned neighbours sit closer to the centre frame on the generated conveyor's moving lane,
the flow to a neighbour two frames away is the two steps between consecutive frames composed (each step estimated
once, in bounded memory), the centre frame is never warped, training windows equal the runtime's, and a bad value
is refused."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from skimage import data as sample_images

from grainwright.inference.images import alignment
from grainwright.inference.images.alignment import (
    ALIGNMENTS,
    MEDIAN_OFFSETS,
    AlignedNeighbours,
    align_to_centre,
    aligned_frames,
    check_alignment,
    compose_flows,
    flow_steps,
    held_still,
    lucas_kanade_flow,
    neighbour_flow,
    sampled_median,
    warp_onto_centre,
)
from grainwright.inference.runtime import stack_window
from grainwright.inference.runtime.stack_window import sliding_windows
from grainwright.inference.synthetic.stack_scenario import conveyor_sequence


@pytest.mark.parametrize("shift", [(1.3, -2.6), (-0.4, 3.5)])
def test_the_flow_recovers_a_known_subpixel_translation_of_a_sample_image(shift):
    """Reference: scikit-image's open sample image ``camera`` shifted by ``scipy.ndimage.shift`` (cubic spline), with
    Gaussian noise of 8 grey levels in both frames. ``ndimage.shift`` moves the content by ``shift``, so a centre
    pixel is found ``shift`` further in the neighbour: the flow must read ``shift`` (median over the interior, within
    0.1 pixel; tolerance ours), and the warped neighbour must match the centre frame far better than the shifted one."""
    rng = np.random.default_rng(0)
    camera = sample_images.camera().astype(np.float32)
    centre = camera + rng.normal(0, 8, camera.shape).astype(np.float32)
    neighbour = ndimage.shift(camera, shift, order=3, mode="nearest") + rng.normal(0, 8, camera.shape)
    flow = neighbour_flow(centre[..., None], neighbour[..., None])
    interior = (slice(32, -32), slice(32, -32))
    assert flow.shape == (2, *camera.shape) and flow.dtype == np.float32
    found = [float(np.median(flow[axis][interior])) for axis in (0, 1)]
    assert np.allclose(found, shift, atol=0.1), found
    aligned = warp_onto_centre(neighbour[..., None], flow)[..., 0]
    before = np.sqrt(np.mean((neighbour - camera)[interior] ** 2))
    after = np.sqrt(np.mean((aligned - camera)[interior] ** 2))
    assert after < 0.5 * before, (before, after)


def _camera_pair(shift, noise=8.0, seed=6):
    rng = np.random.default_rng(seed)
    camera = sample_images.camera()[::2, ::2].astype(np.float32) / 255
    centre = camera + rng.normal(0, noise / 255, camera.shape)
    neighbour = ndimage.shift(camera, shift, order=3, mode="nearest") + rng.normal(0, noise / 255, camera.shape)
    return (ndimage.gaussian_filter(frame, 1.0).astype(np.float32) for frame in (centre, neighbour))


def test_the_lucas_kanade_solver_matches_scikit_image(monkeypatch):
    """Reference: scikit-image's ``optical_flow_ilk`` (the same coarse-to-fine iterative Lucas-Kanade, solving each
    pixel's 2 x 2 system with ``numpy.linalg.solve``), radius 7, 10 iterations per level, on a noisy sample image
    ``camera`` and its sub-pixel shift. With 10 iterations at full resolution too, our closed-form solver must give
    the same flow up to float32 rounding (measured: at most 3.4e-5 pixel; bound ours)."""
    from skimage.registration import optical_flow_ilk

    reference, moving = _camera_pair((0.7, -2.4))
    monkeypatch.setattr(alignment, "FINEST_WARPS", 10)
    ours = lucas_kanade_flow(reference, moving)
    theirs = optical_flow_ilk(reference, moving, radius=7, num_warp=10)
    assert ours.shape == theirs.shape and ours.dtype == np.float32
    assert np.max(np.abs(ours - theirs)) < 1e-3


def test_fewer_iterations_at_full_resolution_still_find_the_shift():
    """With ``FINEST_WARPS`` (5) iterations at full resolution the flow of a known sub-pixel shift of ``camera``
    (reference: ``scipy.ndimage.shift``) is read within 0.05 pixel in the median over the interior, as scikit-image's
    10 iterations read it (measured: 0.003 and 0.014 pixel from the shift, 3e-5 from scikit-image's; tolerance
    ours)."""
    from skimage.registration import optical_flow_ilk

    shift = (0.7, -2.4)
    reference, moving = _camera_pair(shift)
    interior = (slice(16, -16), slice(16, -16))
    ours, theirs = lucas_kanade_flow(reference, moving), optical_flow_ilk(reference, moving, radius=7)
    for axis in (0, 1):
        assert abs(np.median(ours[axis][interior]) - shift[axis]) < 0.05
        assert abs(np.median(ours[axis][interior]) - np.median(theirs[axis][interior])) < 0.05


def test_the_median_takes_the_window_on_its_sampled_grid():
    """Reference: numpy's median of the 25 values at ``MEDIAN_OFFSETS`` x ``MEDIAN_OFFSETS`` around each pixel, the
    flow padded by repeating its edges (``numpy.pad`` mode ``edge``); both components, exactly."""
    flow = np.random.default_rng(7).normal(0, 2, (2, 23, 31)).astype(np.float32)
    reach = max(abs(offset) for offset in MEDIAN_OFFSETS)
    padded = np.pad(flow, ((0, 0), (reach, reach), (reach, reach)), mode="edge")
    height, width = flow.shape[1:]
    samples = np.stack([padded[:, reach + dy:reach + dy + height, reach + dx:reach + dx + width]
                        for dy in MEDIAN_OFFSETS for dx in MEDIAN_OFFSETS])
    assert np.array_equal(sampled_median(flow), np.median(samples, axis=0).astype(np.float32))


def test_the_flow_does_not_depend_on_the_units_of_the_pixel_values():
    """The frames are mapped together to the centre frame's percentiles first, so native values and working units
    (a linear map of them) give the same flow: the runtime and the trainer align alike. The zero-motion test is a
    threshold, so float32 rounding can tip a pixel that sits on it, and the median carries that into its window:
    measured, 48 of 32,768 flow values (0.15 %) differ here; the bound allows 0.5 %."""
    rng = np.random.default_rng(1)
    camera = sample_images.camera()[:128, :128].astype(np.float32)
    centre = (camera + rng.normal(0, 8, camera.shape))[..., None].astype(np.float32)
    neighbour = (ndimage.shift(camera, (0.0, 2.0), mode="nearest") + rng.normal(0, 8, camera.shape))[..., None]
    native = neighbour_flow(centre * 16 + 100, neighbour.astype(np.float32) * 16 + 100)
    working = neighbour_flow(centre / 255, neighbour.astype(np.float32) / 255)
    assert np.mean(np.abs(native - working) > 1e-3) < 0.005


def test_aligned_neighbours_are_closer_to_the_centre_frame_on_the_moving_lane():
    """The generated conveyor (our scenario: the lane moves 3 pixels per frame to the right, the rest holds still).
    The flow is estimated on the noisy frames; warping the neighbours 1 and 2 frames away with it must bring them
    much closer to the centre frame on the lane, both the clean frames and the noisy ones (against the clean
    centre), and leave the still scene about as close as it was."""
    sequence = conveyor_sequence(height=192, width=256, seed=0)  # the bench's size
    noisy, clean, lane = sequence.noisy.astype(np.float32), sequence.clean.astype(np.float32), sequence.moving
    centre = 10

    def rms(values, mask):
        return float(np.sqrt(np.mean((values - clean[centre])[mask] ** 2)))

    for offset in (1, 2):
        flow = neighbour_flow(noisy[centre][..., None], noisy[centre + offset][..., None])
        assert abs(np.median(flow[1][lane]) - 3 * offset) < 0.2 and abs(np.median(flow[0][lane])) < 0.2
        warped_clean = warp_onto_centre(clean[centre + offset][..., None], flow)[..., 0]
        warped_noisy = warp_onto_centre(noisy[centre + offset][..., None], flow)[..., 0]
        assert rms(warped_clean, lane) < 0.25 * rms(clean[centre + offset], lane)
        assert rms(warped_noisy, lane) < 0.75 * rms(noisy[centre + offset], lane)
        assert rms(warped_noisy, ~lane) < 1.1 * rms(noisy[centre + offset], ~lane)


def test_a_still_scene_keeps_zero_motion_and_its_neighbour_unresampled():
    """Two noisy frames of the same still scene (scikit-image's sample image ``camera``, independent Gaussian noise
    of 8 grey levels): the Lucas-Kanade flow alone follows the noise where the image is flat, so the zero-motion
    test must hold most pixels at zero motion, and there the aligned neighbour is the neighbour itself, not a
    resampling of it. Measured: 94 % held at zero (without the test none is; on the conveyor's still scene the
    flow's median was 0.6 to 0.7 pixel). Bound ours."""
    rng = np.random.default_rng(4)
    camera = sample_images.camera()[::2, ::2].astype(np.float32)
    centre, neighbour = ((camera + rng.normal(0, 8, camera.shape))[..., None].astype(np.float32) for _ in range(2))
    flow = neighbour_flow(centre, neighbour)
    held = np.all(flow == 0, axis=0)
    assert held.mean() > 0.9, held.mean()
    assert np.array_equal(align_to_centre(centre, neighbour)[held], neighbour[held])


def test_the_zero_motion_test_lets_real_motion_through():
    """A whole-pixel motion of the sample image ``camera`` (3 pixels to the right, the conveyor's speed): the test
    holds no pixel with structure at zero motion (gradient magnitude above 5 grey levels per pixel after a 2-pixel
    Gaussian; the noise is 8), only flat ones, where any shift looks the same (measured: 20 % of the interior, the
    sky), and the flow reads 3 pixels."""
    rng = np.random.default_rng(5)
    camera = sample_images.camera()[::2, ::2].astype(np.float32)
    centre = camera + rng.normal(0, 8, camera.shape)
    neighbour = np.roll(camera, 3, axis=1) + rng.normal(0, 8, camera.shape)
    reference, moving = (frame.astype(np.float32) / 255 for frame in (centre, neighbour))
    flow = neighbour_flow(centre[..., None].astype(np.float32), neighbour[..., None].astype(np.float32))
    interior = (slice(16, -16), slice(16, -16))
    held = held_still(reference, moving, np.stack([np.zeros_like(camera), np.full_like(camera, 3.0)]))
    structure = ndimage.gaussian_gradient_magnitude(camera, 2) > 5
    assert not held[interior][structure[interior]].any() and held[interior].mean() < 0.3
    assert abs(np.median(flow[1][interior]) - 3) < 0.1 and abs(np.median(flow[0][interior])) < 0.1


def test_the_warp_is_the_cubic_spline_resampling():
    """Reference: SciPy's ``ndimage.shift`` (cubic spline, ``order=3``, edges repeated) of the sample image
    ``camera`` by a constant sub-pixel shift; ``warp_onto_centre`` with the opposite constant flow must give the
    same values (the centre pixel is found ``flow`` further in the neighbour). Tolerance ours."""
    camera = sample_images.camera()[:96, :128].astype(np.float32)
    flow = np.stack([np.full(camera.shape, 0.25, np.float32), np.full(camera.shape, -1.5, np.float32)])
    warped = warp_onto_centre(camera[..., None], flow)[..., 0]
    reference = ndimage.shift(camera.astype(np.float64), (-0.25, 1.5), order=3, mode="nearest")
    interior = (slice(8, -8), slice(8, -8))
    assert np.max(np.abs(warped - reference)[interior]) < 0.5


def test_the_centre_frame_is_never_warped_and_none_keeps_the_frames():
    stack = np.random.default_rng(2).normal(100, 10, (5, 24, 20, 1)).astype(np.float32)
    positions = np.array([2, 1, 0, 1, 2])  # a window reflected at the start of the stack
    aligned = aligned_frames(stack, positions, "optical-flow")
    assert aligned[2] is stack[0] or np.array_equal(aligned[2], stack[0])
    assert np.array_equal(aligned[1], aligned[3]) and not np.array_equal(aligned[1], stack[1])
    assert np.array_equal(aligned[1], align_to_centre(stack[0], stack[1]))
    assert all(np.array_equal(a, stack[p]) for a, p in zip(aligned_frames(stack, positions, "none"), positions))


@pytest.mark.parametrize("method", ["optical-flow", "dominant-shifts"])
def test_training_windows_equal_the_runtime_windows(method):
    """The trainer's windows (``trainer.data.stack_windows``) and the runtime's (``sliding_windows``) align with
    the same function, so a centre frame's training input is exactly its run-time input."""
    pytest.importorskip("torch")
    from grainwright.trainer.data import stack_windows

    stack = conveyor_sequence(frames=9, height=48, width=64, seed=1).noisy.astype(np.float32)[..., None]
    training = stack_windows(None, stack, 3, alignment=method)
    runtime = dict(sliding_windows(lambda j: stack[j], 9, 3, alignment=method))
    for index, pair in enumerate(training):
        assert np.array_equal(pair["noisy"], runtime[index])
        assert np.array_equal(pair["noisy_b"], runtime[index + 3])


def test_each_frame_pairs_flow_is_computed_once(monkeypatch):
    from grainwright.inference.images import alignment

    calls = []
    real = alignment.neighbour_flow
    monkeypatch.setattr(alignment, "neighbour_flow", lambda c, n: calls.append(1) or real(c, n))
    stack = np.random.default_rng(3).normal(100, 10, (6, 16, 16, 1)).astype(np.float32)
    cache = AlignedNeighbours(stack)
    for _ in range(3):
        aligned_frames(stack, np.array([1, 2, 3]), "optical-flow", cache)
    assert len(calls) == 2


def test_composing_two_motions_gives_the_motion_of_both():
    """Reference: the composition of two affine maps, worked by hand. ``first`` moves every pixel by (1.5, -2.0);
    ``second`` is an affine field, (0.1 row - 0.5, 0.2 col + 1.0), which bilinear sampling reproduces exactly
    between grid points: a pixel x of frame a is at x + first in frame b and at x + first + second(x + first) in
    frame c. Where ``first`` is zero the composition is ``second`` itself, exactly (a still pixel stays still)."""
    rows, cols = np.meshgrid(np.arange(24, dtype=np.float32), np.arange(32, dtype=np.float32), indexing="ij")
    first = np.stack([np.full_like(rows, 1.5), np.full_like(rows, -2.0)])
    second = np.stack([0.1 * rows - 0.5, 0.2 * cols + 1.0])
    expected = np.stack([1.5 + 0.1 * (rows + 1.5) - 0.5, -2.0 + 0.2 * (cols - 2.0) + 1.0])
    composed = compose_flows(first, second)
    interior = (slice(0, 22), slice(2, 32))  # positions inside the frame (beyond it the edge value is repeated)
    assert composed.dtype == np.float32
    assert np.allclose(composed[0][interior], expected[0][interior], atol=1e-5)
    assert np.allclose(composed[1][interior], expected[1][interior], atol=1e-5)
    assert np.array_equal(compose_flows(np.zeros_like(first), second), second)


def test_the_steps_run_from_the_centre_towards_the_neighbour_at_the_window_spacing():
    assert flow_steps(5, 6) == [(5, 6)] and flow_steps(5, 3) == [(5, 4), (4, 3)]
    assert flow_steps(5, 7) == [(5, 6), (6, 7)] and flow_steps(1, 9, 4) == [(1, 5), (5, 9)]
    assert flow_steps(0, 3, 2) == [(0, 2), (2, 3)]  # a distance not a multiple of the spacing: a shorter last step


def test_the_flow_two_frames_on_is_the_two_steps_composed_and_finds_the_lane():
    """The generated conveyor (the lane moves 3 pixels per frame to the right): the flow from the centre frame to
    the frame two on is the flow of its step to the next frame composed with that frame's step onward, each step
    estimated by ``neighbour_flow`` on the noisy frames; it reads the lane's 6 pixels and brings the clean
    neighbour much closer to the clean centre frame on the lane, as the direct flow did (the test above)."""
    sequence = conveyor_sequence(height=192, width=256, seed=0)
    noisy, clean, lane = sequence.noisy.astype(np.float32)[..., None], sequence.clean.astype(np.float32), sequence.moving
    cache = AlignedNeighbours(noisy)
    for centre, neighbour in ((10, 12), (10, 8)):
        middle = (centre + neighbour) // 2
        flow = cache.flow(centre, neighbour)
        expected = compose_flows(neighbour_flow(noisy[centre], noisy[middle]), neighbour_flow(noisy[middle], noisy[neighbour]))
        assert np.array_equal(flow, expected)
        assert abs(np.median(flow[1][lane]) - 3 * (neighbour - centre)) < 0.2 and abs(np.median(flow[0][lane])) < 0.2
        warped = warp_onto_centre(clean[neighbour][..., None], flow)[..., 0]
        before, after = (float(np.sqrt(np.mean((values - clean[centre])[lane] ** 2))) for values in (clean[neighbour], warped))
        assert after < 0.25 * before, (before, after)


def test_sliding_along_a_stack_estimates_each_step_once_and_keeps_a_bounded_cache(monkeypatch):
    """A K = 5 window slid along N frames estimates the flow of each ordered pair of consecutive frames once:
    2 (N - 1) estimates, two per output frame (four before the steps were reused), and the cache it keeps holds
    no more than the window needs, however long the stack."""
    calls, caches = [], []
    real = alignment.neighbour_flow
    monkeypatch.setattr(alignment, "neighbour_flow", lambda c, n: calls.append(1) or real(c, n))

    class Recorded(AlignedNeighbours):
        def __init__(self, *arguments, **keywords):
            super().__init__(*arguments, **keywords)
            caches.append(self)

    monkeypatch.setattr(stack_window, "AlignedNeighbours", Recorded)
    count = 30
    stack = np.random.default_rng(8).normal(100, 10, (count, 16, 16, 1)).astype(np.float32)
    largest = 0
    for _ in sliding_windows(lambda j: stack[j], count, 5, alignment="optical-flow"):
        largest = max(largest, len(caches[0]._steps) + len(caches[0]._flows) + len(caches[0]._warped))
    assert len(calls) == 2 * (count - 1)
    assert largest <= 2 * 4 + 4 + 4  # the steps within the window, and the centre frame's flows and neighbours


def test_an_unknown_alignment_is_refused_naming_the_setting():
    assert check_alignment("optical-flow", "x") == "optical-flow" and ALIGNMENTS[0] == "none"
    with pytest.raises(ValueError, match="model.align_neighbours is 'sideways', not one of none, optical-flow"):
        check_alignment("sideways", "model.align_neighbours")
