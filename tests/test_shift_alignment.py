"""The dominant-shifts alignment (``inference/images/shift_alignment.py``): phase correlation finds a known
whole-pixel translation of a sample image and two motions at once, each pixel takes its own, the warp moves whole
pixels exactly, the backward motion is the forward one reversed, pure noise finds no motion (so no neighbour is
moved by the centre frame's noise), and a stack slid in chunks gives the same windows as whole."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from skimage import data as sample_images

from grainwright.inference.images.alignment import AlignedNeighbours
from grainwright.inference.images.shift_alignment import (
    PreparedFrame,
    ShiftField,
    candidate_shifts,
    compose_shifts,
    pair_shifts,
    warp_by_shifts,
)
from grainwright.inference.runtime.stack_window import sliding_windows
from grainwright.inference.synthetic.stack_scenario import conveyor_sequence


def _moved(image: np.ndarray, shift: tuple[int, int]) -> np.ndarray:
    """``image`` moved by ``shift`` (row, column): sampled at ``x - shift``, the edge repeated (numpy.pad, mode
    "edge"); the neighbour in which each centre pixel ``x`` is found at ``x + shift``."""
    rows, cols = shift
    reach = max(abs(rows), abs(cols))
    padded = np.pad(image, reach, mode="edge")
    return padded[reach - rows:reach - rows + image.shape[0], reach - cols:reach - cols + image.shape[1]]


@pytest.mark.parametrize("shift", [(0, 3), (-2, 5), (4, -1)])
def test_a_known_translation_of_a_sample_image_is_found_and_undone_exactly(shift):
    """Reference: scikit-image's bundled ``camera`` image (open data) and a translation applied by array slicing;
    the noise is 5 % of the range. The candidate list holds the shift; away from the edges, the textured pixels
    take it (the flat sky is explained as well by zero motion, which is kept there); wherever it is taken, the clean
    neighbour warped is the clean centre frame exactly (whole pixels, no resampling), and the backward motion is
    the forward one reversed."""
    rng = np.random.default_rng(0)
    centre = sample_images.camera()[::2, ::2].astype(np.float32)
    neighbour = _moved(centre, shift)
    noisy_centre, noisy_neighbour = (image + rng.normal(0, 12, image.shape) for image in (centre, neighbour))
    prepared = PreparedFrame(noisy_centre[..., None]), PreparedFrame(noisy_neighbour[..., None])
    assert shift in candidate_shifts(*prepared)
    forward, backward = (field.as_flow() for field in pair_shifts(*prepared))
    inner = (slice(16, -16), slice(16, -16))
    taken = (forward[0] == shift[0]) & (forward[1] == shift[1])
    textured = ndimage.generic_filter(centre, np.std, 9) > 20  # DN; 256-level image
    assert np.mean(taken[inner][textured[inner]]) > 0.95
    warped = warp_by_shifts(neighbour[..., None], pair_shifts(*prepared)[0])[..., 0]
    assert np.array_equal(warped[inner][taken[inner]], centre[inner][taken[inner]])
    back_taken = (backward[0] == -shift[0]) & (backward[1] == -shift[1])
    assert np.mean(back_taken[inner][_moved(textured, shift)[inner]]) > 0.95


def test_two_motions_are_found_and_each_pixel_takes_its_own():
    """The generated conveyor (the lane moves 3 pixels per frame to the right, the rest holds still): zero motion
    and (0, 3) are the candidates, the lane's textured pixels take (0, 3) and the still scene zero motion, and the
    clean neighbour warped by the motion found on the noisy frames is much closer to the clean centre frame on the
    lane than unwarped."""
    sequence = conveyor_sequence(frames=4, seed=0)
    noisy, clean = sequence.noisy.astype(np.float32)[..., None], sequence.clean[..., None]
    top, bottom = sequence.motion["lane_rows"]
    centre, neighbour = PreparedFrame(noisy[1]), PreparedFrame(noisy[2])
    assert candidate_shifts(centre, neighbour)[:2] == [(0, 0), (0, 3)]
    field, _ = pair_shifts(centre, neighbour)
    forward = field.as_flow()
    visible = np.abs(clean[2] - clean[1])[..., 0] > 60  # DN: where the motion changes the clean pixel visibly
    lane = (slice(top + 8, bottom - 8), slice(8, -8))
    assert np.mean(forward[1][lane][visible[lane]] == 3) > 0.9 and np.all(forward[0][lane] == 0)
    assert np.mean(forward[:, :top - 8] == 0) > 0.97 and np.mean(forward[:, bottom + 8:] == 0) > 0.97
    warped = warp_by_shifts(clean[2], field)[..., 0]
    before, after = (float(np.sqrt(np.mean((values - clean[1, ..., 0])[top:bottom] ** 2)))
                     for values in (clean[2, ..., 0], warped))
    assert after < 0.2 * before, (before, after)


def test_pure_noise_finds_no_motion_and_leaves_the_neighbour_as_it_is():
    """No identity shortcut: on frames of independent noise no translation stands out of the correlation, the
    motion is zero everywhere and the aligned neighbour is the neighbour itself, holding none of the centre frame's
    noise (eight draws)."""
    rng = np.random.default_rng(4)
    for _ in range(8):
        stack = rng.normal(1000, 50, (3, 96, 128, 1)).astype(np.float32)
        assert candidate_shifts(PreparedFrame(stack[1]), PreparedFrame(stack[2])) == [(0, 0)]
        aligned = AlignedNeighbours(stack, alignment="dominant-shifts")
        assert np.array_equal(aligned(1, 2), stack[2]) and np.array_equal(aligned(1, 0), stack[0])


def test_composing_whole_pixel_motions_is_exact():
    """``first`` moves the left half by (0, 2) and the right half by (1, 0); ``second`` moves everything by
    (0, -1) except the bottom row: the composition at each pixel is ``first(x) + second(x + first(x))``, worked
    here by hand, edges clipped."""
    left = np.zeros((4, 6), np.int8)
    left[:, 3:] = 1
    first = ShiftField(left, np.array([[0, 2], [1, 0]]))
    bottom = np.zeros((4, 6), np.int8)
    bottom[3] = 1
    second = ShiftField(bottom, np.array([[0, -1], [0, 0]]))
    both = compose_shifts(first, second).as_flow()
    assert np.array_equal(both[1, :3, :3], np.full((3, 3), 1))  # (0, 2) then (0, -1) on rows 0..2
    assert np.array_equal(both[1, 3, :3], np.full(3, 2))  # the bottom row does not move in the second step
    assert np.array_equal(both[0, :, :3], np.zeros((4, 3)))
    assert np.array_equal(both[0, :, 3:], np.ones((4, 3)))  # (1, 0) then...
    assert np.array_equal(both[1, :2, 3:], np.full((2, 3), -1))  # ...rows 0 and 1 land on rows 1, 2: (0, -1)
    assert np.array_equal(both[1, 2:, 3:], np.zeros((2, 3)))  # rows 2, 3 land on row 3 (clipped): still


def test_the_warp_repeats_the_edge_beyond_the_frame_and_equals_the_dense_flow_lookup():
    """Reference: the dense lookup ``frame[clip(y + dy), clip(x + dx)]`` with numpy indexing."""
    frame = np.arange(12, dtype=np.float32).reshape(3, 4, 1)
    right = ShiftField(np.zeros((3, 4), np.int8), np.array([[0, 3]]))
    assert np.array_equal(warp_by_shifts(frame, right)[..., 0], np.repeat(frame[:, 3:4, 0], 4, axis=1))
    labels = np.random.default_rng(2).integers(0, 3, (3, 4)).astype(np.int8)
    field = ShiftField(labels, np.array([[0, 0], [-2, 1], [1, -5]]))
    flow = field.as_flow()
    rows = np.clip(np.arange(3)[:, None] + flow[0], 0, 2)
    cols = np.clip(np.arange(4)[None, :] + flow[1], 0, 3)
    assert np.array_equal(warp_by_shifts(frame, field)[..., 0], frame[rows, cols, 0])


def test_the_motion_does_not_depend_on_the_units_of_the_pixel_values():
    sequence = conveyor_sequence(frames=3, height=96, width=128, seed=2)
    frames = sequence.noisy.astype(np.float32)[..., None]
    native = pair_shifts(PreparedFrame(frames[0]), PreparedFrame(frames[1]))
    scaled = pair_shifts(PreparedFrame(frames[0] / 4095 * 2 - 0.3), PreparedFrame(frames[1] / 4095 * 2 - 0.3))
    assert all(np.array_equal(a.as_flow(), b.as_flow()) for a, b in zip(native, scaled))


@pytest.mark.parametrize("shape", [(1, 1), (2, 3), (5, 7), (9, 4)])
def test_tiny_frames_are_aligned_without_error(shape):
    stack = np.random.default_rng(1).normal(10, 1, (3, *shape, 1)).astype(np.float32)
    aligned = AlignedNeighbours(stack, alignment="dominant-shifts")
    assert aligned(1, 0).shape == (*shape, 1) and aligned(1, 2).shape == (*shape, 1)


def test_a_stack_slid_in_chunks_gives_the_windows_of_the_whole_stack_with_bounded_caches():
    """Chunked equals whole: each output frame's window depends only on the frames it reads, not on where a chunk
    starts; the frames prepared and the pair results kept stay within the window however long the stack."""
    sequence = conveyor_sequence(frames=12, height=48, width=64, seed=3)
    stack = sequence.noisy.astype(np.float32)[..., None]
    whole = dict(sliding_windows(lambda j: stack[j], 12, 5, alignment="dominant-shifts"))
    for start, stop in [(0, 4), (4, 9), (9, 12)]:
        for index, window in sliding_windows(lambda j: stack[j], 12, 5, start, stop, alignment="dominant-shifts"):
            assert np.array_equal(window, whole[index])
    held = {index: stack[index] for index in range(12)}
    aligned = AlignedNeighbours(held, alignment="dominant-shifts")
    for centre in range(2, 10):
        for neighbour in (centre - 2, centre - 1, centre + 1, centre + 2):
            aligned(centre, neighbour)
        aligned.forget(set(range(centre - 1, centre + 4)), centre + 1)
        assert len(aligned.method._prepared) <= 5 and len(aligned.method._pending) <= 4


def test_on_a_moving_scene_the_aligned_neighbour_carries_none_of_the_centre_frames_noise():
    """No identity shortcut where the alignment does move pixels: the generated conveyor's clean frames with fresh
    independent Gaussian noise; the noise the aligned neighbours carry (aligned noisy minus the clean neighbour
    moved by the same motion) is uncorrelated with the centre frame's noise (|r| < 0.02 over 4 neighbours of
    49,152 pixels; for independent samples the spread of r is about 1 / sqrt(n) = 0.005)."""
    sequence = conveyor_sequence(frames=7, seed=5)
    clean = sequence.clean[..., None].astype(np.float32)
    noise = np.random.default_rng(6).normal(0, 120, clean.shape).astype(np.float32)
    aligned = AlignedNeighbours(clean + noise, alignment="dominant-shifts")
    moved = 0.0
    for neighbour in (1, 2, 4, 5):
        field = aligned.flow(3, neighbour)
        moved += np.mean(np.any(field.as_flow() != 0, axis=0)) / 4
        carried = aligned(3, neighbour) - warp_by_shifts(clean[neighbour], field)
        assert abs(np.corrcoef(carried.ravel(), noise[3].ravel())[0, 1]) < 0.02
    assert moved > 0.2  # the lane (40 % of the frame) did move
