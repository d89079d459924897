"""Motion compensation by a few dominant whole-pixel translations: the cheap alternative to the optical flow of
:mod:`grainwright.inference.images.alignment` for scenes whose motion is a handful of rigid shifts (a conveyor, a
stage, a panning camera over a still background), meant for the line where the alignment must cost a small part of
the network's time.

Method. For each pair of consecutive frames the candidate translations are the peaks of their phase correlation
(Kuglin and Hines, "The phase correlation image alignment method", 1975), computed on the whole frames with the
cross-power spectrum divided by the square root of its magnitude instead of by the magnitude itself (a partial
whitening, our choice: the full whitening weights every frequency alike, and in a noisy frame the high ones are
mostly noise). A peak counts if it lies within ``REACH`` pixels of zero and stands ``SIGNIFICANCE`` standard
deviations above the surface's mean (a rule of thumb of ours: the largest of 50,000 independent Gaussian values is
about 4.5 standard deviations, so pure noise gives none); at most ``PEAKS`` of them join zero motion, which is
always a candidate. Each pixel then takes the candidate that best explains the neighbour around it: the squared
residual ``centre(x) - neighbour(x + c)`` is summed over 2 x 2 blocks (averaging the noise before squaring) and
averaged over ``WINDOW`` blocks square (``2 * WINDOW`` pixels), and zero motion is kept unless another candidate's
residual is lower by more than the factor ``1 + MARGIN`` (block matching restricted to the candidates; the margin
plays the part of the optical flow's zero-motion test). The warp moves whole pixels only, so a warped neighbour
holds the neighbour's own pixel values, noise unmixed; a true sub-pixel motion leaves up to half a pixel for the
network to absorb. Rotation, zoom and deformation are not modelled: where no candidate fits, zero motion is kept
and the network meets the neighbour unaligned, as without alignment. For such scenes use ``"optical-flow"``.

Measured on the generated conveyor sequence (the lane moves 3 pixels per frame; docs/benchmarks.md, "Stacks and
volumes"), the clean neighbour warped with the motion found on the noisy frames, RMS against the clean centre frame
in DN (seeds 0 / 1, the four frame pairs of the optical-flow probes): lane 26.3 / 34.5, still scene 12.3 / 26.3,
against the optical flow's 25.6 / 37.0 and 10.8 / 20.5. The motion is held as a :class:`ShiftField` (a label per
pixel into a short list of shifts), so that composing and warping are one array slice per shift: the alignment of
one output frame of 512 x 512 (K = 5, one thread) costs about 0.035 s per megapixel, against about 2.3 for the
optical flow.

Flow reuse as for the optical flow: :class:`grainwright.inference.images.alignment.AlignedNeighbours` asks for the
motion between consecutive frames and composes it for the frames further away. One correlation and one set of
residuals serve both directions of a pair: the residual of the backward candidate ``-c`` at ``y``,
``neighbour(y) - centre(y - c)``, is minus the forward one at ``y - c``, so the backward cost maps are the forward
ones shifted by ``c`` (at the 2 x 2 blocks' resolution, rounded).

No identity shortcut. The warped neighbour is the neighbour's pixels, moved; the centre frame's noise reaches it
only through the choice among a few candidates, made from residuals pooled over ``(2 * WINDOW)^2`` pixels, and
through the candidates themselves, which the whole frame decides. On pure noise no candidate other than zero
passes, and the neighbour is taken as it is (tests/test_shift_alignment.py).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft
from scipy import ndimage

REACH = 8  # pixels; the largest translation between consecutive frames looked for, in each axis
PEAKS = 3  # candidate translations besides zero motion, at most
SIGNIFICANCE = 8.0  # a correlation peak counts if this many standard deviations above the surface's mean
WINDOW = 8  # 2 x 2 blocks; the side of the square over which each pixel's residuals are averaged (16 pixels)
MARGIN = 0.3  # zero motion kept unless another candidate's residual is lower by more than this factor (measured)
PADDING_STEPS = 2  # a neighbour is padded once for motions of this many steps (a K = 5 window's farthest frames)


class PreparedFrame:
    """One frame as the shift search uses it: the mean over the channels (float32), a copy padded by ``REACH``
    with edge values, and the spectrum of the frame less its mean (computed once per frame, used by both pairs it
    belongs to)."""

    def __init__(self, frame: np.ndarray):
        image = np.asarray(frame, np.float32)
        self.image = image.mean(axis=2) if image.ndim == 3 else image
        self.padded = np.pad(self.image, REACH, mode="edge")
        self.spectrum = scipy.fft.rfft2(self.image - self.image.mean())

    def shifted(self, shift: tuple[int, int]) -> np.ndarray:
        """The frame sampled at ``x + shift`` (whole pixels, edge values beyond the frame)."""
        return _moved(self.padded, REACH, shift, self.image.shape)


def candidate_shifts(centre: PreparedFrame, neighbour: PreparedFrame) -> list[tuple[int, int]]:
    """Zero motion and up to ``PEAKS`` whole-pixel translations ``c`` (row, column) with ``neighbour(x + c)``
    close to ``centre(x)`` somewhere in the frame: the significant local maxima of the partially whitened phase
    correlation within ``REACH`` pixels, strongest first."""
    cross = neighbour.spectrum * np.conj(centre.spectrum)
    cross /= np.sqrt(np.abs(cross)) + np.finfo(np.float32).tiny  # partial whitening (full: the magnitude itself)
    surface = scipy.fft.irfft2(cross, s=centre.image.shape)
    reach = min(REACH, (min(surface.shape) - 3) // 2)
    if reach < 1:
        return [(0, 0)]
    offsets = np.arange(-reach - 1, reach + 2)  # one more on each side, for the local-maximum test
    near = surface[np.ix_(offsets % surface.shape[0], offsets % surface.shape[1])]
    peaks = (near == ndimage.maximum_filter(near, 3)) & (near > surface.mean() + SIGNIFICANCE * surface.std())
    peaks[[0, -1], :] = peaks[:, [0, -1]] = False
    rows, cols = np.nonzero(peaks)
    shifts = [(0, 0)]
    for index in np.argsort(near[rows, cols])[::-1]:
        shift = (int(rows[index]) - reach - 1, int(cols[index]) - reach - 1)
        if shift != (0, 0) and len(shifts) <= PEAKS:
            shifts.append(shift)
    return shifts


def _block_sums(values: np.ndarray) -> np.ndarray:
    """Sums over 2 x 2 blocks (a trailing odd row or column dropped)."""
    return values[0:-1:2, 0:-1:2] + values[1::2, 0:-1:2] + values[0:-1:2, 1::2] + values[1::2, 1::2]


@dataclass(frozen=True, eq=False)
class ShiftField:
    """A whole-pixel motion held as one of a few shifts per pixel: ``labels`` ``(H, W)`` indexes ``shifts``
    ``(L, 2)`` (row, column). Each pixel ``x`` of the first frame is found at ``x + shifts[labels[x]]`` in the
    second. Cheaper to compose and to warp by than a dense flow: every operation is one array slice per shift."""

    labels: np.ndarray
    shifts: np.ndarray

    @property
    def reach(self) -> int:
        """The largest displacement in either axis, pixels."""
        return int(np.abs(self.shifts).max())

    def as_flow(self) -> np.ndarray:
        """The dense ``(2, H, W)`` int16 flow (row and column displacement per pixel)."""
        table = self.shifts.astype(np.int16)
        return np.stack([table[:, 0].take(self.labels), table[:, 1].take(self.labels)])


def _field(blocks: np.ndarray, shifts: list[tuple[int, int]], shape: tuple[int, int]) -> ShiftField:
    """The field of block labels (indices into ``shifts``), each block's label repeated over its 2 x 2 pixels, an
    odd trailing row or column taking its neighbour's."""
    full = blocks.astype(np.int8).repeat(2, axis=0).repeat(2, axis=1)
    labels = np.pad(full, ((0, shape[0] - full.shape[0]), (0, shape[1] - full.shape[1])), mode="edge")
    return ShiftField(labels, np.asarray(shifts, np.int32).reshape(-1, 2))


def _shifted_costs(costs: np.ndarray, shift: tuple[int, int]) -> np.ndarray:
    """``costs`` (blocks) sampled at ``y - shift / 2`` blocks (rounded towards zero), edge values beyond."""
    rows, cols = (int(np.fix(value / 2)) for value in shift)
    reach = max(abs(rows), abs(cols))
    return _moved(np.pad(costs, reach, mode="edge"), reach, (-rows, -cols), costs.shape)


def pair_shifts(centre: PreparedFrame, neighbour: PreparedFrame) -> tuple[ShiftField, ShiftField]:
    """The whole-pixel motion of every pixel from ``centre`` to ``neighbour`` and back (two :class:`ShiftField`),
    each pixel taking the candidate (:func:`candidate_shifts`) with the smallest residual over its window, zero
    motion favoured by ``MARGIN``."""
    shape = centre.image.shape
    shifts = candidate_shifts(centre, neighbour)
    if len(shifts) == 1 or min(shape) < 2:
        still = ShiftField(np.zeros(shape, np.int8), np.zeros((1, 2), np.int32))
        return still, still
    costs = np.stack([ndimage.uniform_filter(_block_sums(centre.image - neighbour.shifted(shift)) ** 2, WINDOW)
                      for shift in shifts])
    backward = np.stack([_shifted_costs(cost, shift) for cost, shift in zip(costs, shifts)])
    costs[0] /= 1.0 + MARGIN
    backward[0] /= 1.0 + MARGIN
    return (_field(_least(costs), shifts, shape),
            _field(_least(backward), [(-rows, -cols) for rows, cols in shifts], shape))


def _least(costs: np.ndarray) -> np.ndarray:
    """``costs.argmin(axis=0)`` (the first on ties) for a few candidates, one comparison per candidate (faster
    than numpy's argmin along the first axis)."""
    best, labels = costs[0].copy(), np.zeros(costs.shape[1:], np.int8)
    for label in range(1, len(costs)):
        better = costs[label] < best
        labels[better] = label
        np.minimum(best, costs[label], out=best)
    return labels


def _moved(padded: np.ndarray, reach: int, shift: tuple[int, int] | np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """The view of ``padded`` (an array padded by ``reach`` with edge values) sampled at ``x + shift``."""
    top, left = reach + int(shift[0]), reach + int(shift[1])
    return padded[top:top + shape[0], left:left + shape[1]]


def _select(padded: np.ndarray, reach: int, field: ShiftField) -> np.ndarray:
    """``padded`` (padded by ``reach`` >= the field's reach) sampled at ``x + field(x)``: for each shift in use,
    the slice moved by it copied where the field takes it."""
    shape = field.labels.shape
    result = _moved(padded, reach, field.shifts[0], shape).copy()
    for label in range(1, len(field.shifts)):
        taken = field.labels == label
        if taken.any():
            mask = taken if result.ndim == 2 else taken[..., None]
            np.copyto(result, _moved(padded, reach, field.shifts[label], shape), where=mask)
    return result


def compose_shifts(first: ShiftField, second: ShiftField) -> ShiftField:
    """The whole-pixel motion of two motions in turn, ``first(x) + second(x + first(x))`` (exact: no
    interpolation; positions beyond the frame take the edge's motion)."""
    reach = first.reach
    landed = _select(np.pad(second.labels, reach, mode="edge"), reach, first)  # second's label where x lands
    labels = first.labels.astype(np.int16) * len(second.shifts) + landed
    shifts = (first.shifts[:, None, :] + second.shifts[None, :, :]).reshape(-1, 2)
    return ShiftField(labels, shifts)


def warp_by_shifts(neighbour: np.ndarray, field: ShiftField, padded: np.ndarray | None = None) -> np.ndarray:
    """``neighbour`` ``(H, W, C)`` sampled at ``x + field(x)``, whole pixels, edge values beyond the frame
    (float32 in the neighbour's units). ``padded``: the neighbour already padded by the field's reach or more on
    each side (edge values), to save padding it again."""
    if padded is None:
        padded = _padded_frame(neighbour, field.reach)
    return _select(padded, (padded.shape[0] - neighbour.shape[0]) // 2, field)


def _padded_frame(frame: np.ndarray, reach: int) -> np.ndarray:
    """``frame`` ``(H, W, C)`` as float32, padded by ``reach`` pixels on each side with edge values."""
    return np.pad(np.asarray(frame, np.float32), ((reach, reach), (reach, reach), (0, 0)), mode="edge")


class DominantShifts:
    """The steps of :class:`grainwright.inference.images.alignment.AlignedNeighbours` by dominant whole-pixel
    shifts: each frame prepared once, each unordered pair searched once for both directions; ``forget`` drops what
    refers to frames no longer held."""

    def __init__(self, frames):
        self.frames = frames
        self._prepared: dict[int, PreparedFrame] = {}
        self._pending: dict[tuple[int, int], ShiftField] = {}  # the other direction of a pair already searched
        self._padded: dict[int, np.ndarray] = {}  # a neighbour padded by PADDING_STEPS * REACH, warped 4 times

    def _frame(self, index: int) -> PreparedFrame:
        if index not in self._prepared:
            self._prepared[index] = PreparedFrame(self.frames[index])
        return self._prepared[index]

    def step(self, start: int, end: int) -> ShiftField:
        """The motion from frame ``start`` to frame ``end``; a pair is always searched from its lower index to its
        higher, so that the result never depends on which direction was asked for first (chunked equals whole)."""
        if (start, end) in self._pending:
            return self._pending.pop((start, end))
        first, second = sorted((start, end))
        forward, backward = pair_shifts(self._frame(first), self._frame(second))
        self._pending[end, start] = forward if start > end else backward
        return backward if start > end else forward

    compose = staticmethod(compose_shifts)

    def warp(self, neighbour: int, field: ShiftField) -> np.ndarray:
        frame = self.frames[neighbour]
        padded = self._padded.get(neighbour)
        if padded is None or (padded.shape[0] - frame.shape[0]) // 2 < field.reach:
            padded = self._padded[neighbour] = _padded_frame(frame, max(PADDING_STEPS * REACH, field.reach))
        return warp_by_shifts(frame, field, padded)

    def forget(self, kept: set[int]) -> None:
        for table in (self._prepared, self._padded):
            for index in [index for index in table if index not in kept]:
                del table[index]
        for key in [key for key in self._pending if not set(key) <= kept]:
            del self._pending[key]
