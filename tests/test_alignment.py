"""Neighbour alignment for multi-frame models (``inference/images/alignment.py``): the optical flow recovers a known
sub-pixel translation, aligned neighbours sit closer to the centre frame on the generated conveyor's moving lane,
the centre frame is never warped, training windows equal the runtime's, and a bad value is refused."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from skimage import data as sample_images

from grainwright.inference.images.alignment import (
    ALIGNMENTS,
    AlignedNeighbours,
    align_to_centre,
    aligned_frames,
    check_alignment,
    neighbour_flow,
    warp_onto_centre,
)
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


def test_the_flow_does_not_depend_on_the_units_of_the_pixel_values():
    """The frames are mapped together to the centre frame's percentiles first, so native values and working units
    (a linear map of them) give the same flow: the runtime and the trainer align alike."""
    rng = np.random.default_rng(1)
    camera = sample_images.camera()[:128, :128].astype(np.float32)
    centre = (camera + rng.normal(0, 8, camera.shape))[..., None].astype(np.float32)
    neighbour = (ndimage.shift(camera, (0.0, 2.0), mode="nearest") + rng.normal(0, 8, camera.shape))[..., None]
    native = neighbour_flow(centre * 16 + 100, neighbour.astype(np.float32) * 16 + 100)
    working = neighbour_flow(centre / 255, neighbour.astype(np.float32) / 255)
    assert np.max(np.abs(native - working)) < 1e-3


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


def test_the_centre_frame_is_never_warped_and_none_keeps_the_frames():
    stack = np.random.default_rng(2).normal(100, 10, (5, 24, 20, 1)).astype(np.float32)
    positions = np.array([2, 1, 0, 1, 2])  # a window reflected at the start of the stack
    aligned = aligned_frames(stack, positions, "optical-flow")
    assert aligned[2] is stack[0] or np.array_equal(aligned[2], stack[0])
    assert np.array_equal(aligned[1], aligned[3]) and not np.array_equal(aligned[1], stack[1])
    assert np.array_equal(aligned[1], align_to_centre(stack[0], stack[1]))
    assert all(np.array_equal(a, stack[p]) for a, p in zip(aligned_frames(stack, positions, "none"), positions))


def test_training_windows_equal_the_runtime_windows():
    """The trainer's windows (``trainer.data.stack_windows``) and the runtime's (``sliding_windows``) align with
    the same function, so a centre frame's training input is exactly its run-time input."""
    pytest.importorskip("torch")
    from grainwright.trainer.data import stack_windows

    stack = conveyor_sequence(frames=9, height=48, width=64, seed=1).noisy.astype(np.float32)[..., None]
    training = stack_windows(None, stack, 3, alignment="optical-flow")
    runtime = dict(sliding_windows(lambda j: stack[j], 9, 3, alignment="optical-flow"))
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


def test_an_unknown_alignment_is_refused_naming_the_setting():
    assert check_alignment("optical-flow", "x") == "optical-flow" and ALIGNMENTS[0] == "none"
    with pytest.raises(ValueError, match="model.align_neighbours is 'sideways', not one of none, optical-flow"):
        check_alignment("sideways", "model.align_neighbours")
