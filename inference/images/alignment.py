"""Motion compensation of a multi-frame window: each neighbour warped onto the centre frame before a multi-frame
model sees it, so that a detail moving through the window sits at the same place in every frame.

Method. Motion compensation of the neighbours of a frame to be denoised follows Ehret, Davy, Morel, Facciolo and
Arias, "Model-blind video denoising via frame-to-frame training", CVPR 2019 (they warp with TV-L1 optical flow).
Here the dense flow from the centre frame to each neighbour is estimated on the two noisy frames by coarse-to-fine
iterative Lucas-Kanade (Lucas and Kanade 1981; the iterated window registration of Le Besnerais and Champagnat,
ICIP 2005, as scikit-image's ``skimage.registration.optical_flow_ilk`` implements it), window radius
``FLOW_RADIUS`` pixels, on copies of both frames smoothed by a Gaussian of ``FLOW_SMOOTHING`` pixels (for the flow
only; the warped values are not smoothed). The estimator was chosen by measurement on the generated conveyor
sequence (docs/benchmarks.md, "Stacks and volumes"): iterative Lucas-Kanade at radius 7 found the lane's 3 and 6
pixel shifts to within 0.1 pixel in 0.16 s per frame pair of 192 x 256 (one thread), where scikit-image's TV-L1
(``optical_flow_tvl1`` at its defaults) took 0.30 s and left the warped clean neighbour about 2.7 times further
from the centre frame on the lane; radius 3 and 11 did worse than 7. The solver is this module's
(:func:`lucas_kanade_flow`): scikit-image's algorithm with each pixel's 2 x 2 system solved in closed form, which
gives scikit-image's flow at a third of its time (to 3e-5 pixel on a noisy sample image; on pure noise, where the
systems are nearly singular, float32 rounding moves single vectors further), and ``FINEST_WARPS`` = 5 iterations
at full resolution instead of 10 (``COARSE_WARPS`` on the coarser levels).

Where the frames hold little structure the Lucas-Kanade flow follows the noise: on the conveyor's still scene its
median was 0.6 to 0.7 pixel and its 90th percentile 2 to 3 pixels, so still parts were resampled at noise-driven
shifts and their fine detail blurred. Two steps take that out before the warp (:func:`neighbour_flow`):

1. The zero-motion test (:func:`held_still`): over each Lucas-Kanade window, the mean squared difference between
   the centre frame and the neighbour as it is is compared with that between the centre frame and the neighbour
   shifted by the flow rounded to whole pixels (pixels moved, not mixed, so both residuals carry the same noise).
   Where zero motion does at most ``STILL_MARGIN`` (10 %) worse, the flow is set to zero. A classical motion
   detection by frame differences; the margin is ours, measured.
2. A median filter of each flow component over the Lucas-Kanade window, ``(2 * FLOW_RADIUS + 1)`` pixels square:
   the motion of a part is one value over many windows, and the median takes it while keeping the step at the
   part's edge (Tukey's running median; used to clean optical flow fields by Sun, Roth and Black, "Secrets of
   optical flow estimation and their principles", CVPR 2010), so isolated noise-driven vectors inside a moving
   part and isolated non-zero ones in a still region give way to their surroundings. The window is sampled on a
   5 x 5 grid (``MEDIAN_OFFSETS``, every third or fourth pixel): the flow varies little from one pixel to the next,
   and 25 values instead of 225 make the filter 3 to 4 times cheaper.

Cost and revision. With scikit-image's solver, 10 iterations at full resolution and the dense 15 x 15 median
(revision 1 of this alignment), one output frame of 512 x 512 (four neighbours, one thread) spent 4.0 s in the
flow estimates (two thirds of it in ``numpy.linalg.solve`` and ``det`` on the 2 x 2 systems), 2.8 s in the median
filters and 0.2 s in the rest. The closed-form solver, 5 iterations at full resolution and the sampled median
(revision 2) take that to about a quarter, for the same or better quality at 3,000 fixed steps
on the conveyor sequence (seeds 0, 1, 2; docs/benchmarks.md, where the variants tried are recorded).

Flow reuse (revision 3, ``ALIGN_REVISIONS``). A K = 5 window needs the flow from its centre frame t to t - 2, t - 1,
t + 1 and t + 2, and the next window needs the flow from t + 1 to t + 2 again. :class:`AlignedNeighbours` therefore
estimates the flow (:func:`neighbour_flow`) only between consecutive frames (frames one window spacing apart:
consecutive at run time, ``stride`` apart in training windows that skip frames), each ordered pair once, keeps it
while the window slides, and composes those steps for the frames further away (:func:`compose_flows`:
``f(t -> t + 2)(x) = f(t -> t + 1)(x) + f(t + 1 -> t + 2)(x + f(t -> t + 1)(x))``, the second step sampled
bilinearly): two flow estimates per output frame instead of four, and the alignment of one output frame of
512 x 512 took 0.57 times revision 2's time (one thread). At 3,000 fixed steps on the conveyor sequence, seeds 0, 1,
2, it lost 0.11 dB on the whole frame and 0.007 of the lane cracks' contrast in the mean against revision 2, inside
the seed-to-seed spread (below on two seeds, above on one); deriving the backward steps by inverting the forward
ones (one estimate per output frame) lost 0.20 dB on the moving pixels on every seed and was not taken
(docs/benchmarks.md). A model records the revision it was trained on (the exported ``stack`` entry's
``align_revision``), and the runtime refuses another: the model would meet windows aligned otherwise than in
training.

The neighbour is then resampled at the centre frame's pixel positions plus the flow by ``skimage.transform.warp``
with a cubic spline (order ``WARP_ORDER`` = 3; ``mode="edge"``: a position the motion brings in from outside the
frame takes the nearest edge pixel). Where the flow is zero the neighbour's pixels are taken as they are.
Measured at 3,000 fixed steps on the conveyor sequence, seeds 0 / 1 / 2 (docs/benchmarks.md): the steps and the
cubic spline against the flow as estimated and a bilinear warp (the method before).

The flow is estimated on the mean over the channels, after the same affine map of both frames that takes the
centre frame's 0.5th and 99.5th percentiles to 0 and 1: the estimate is then the same for any linear unit of the
pixel values (native values at run time, working units in the trainer). The centre frame itself is never warped.

No identity shortcut. A self-supervised scheme must not let the target's own noise reach the input. The warped
neighbour ``W_u(y_k)`` is a resampling of the neighbour's pixels only; the centre frame's noise enters it solely
through the flow ``u``, which is estimated from both frames but pools a (2 * FLOW_RADIUS + 1)^2-pixel window per
pixel. For ``recorrupted-stack`` (input: the aligned window plus ``alpha z``; target: the centre
``y_c - z_c / alpha``) the neighbour's input noise ``W_u(n_k) + alpha z_k`` and the target noise
``n_c - z_c / alpha`` are uncorrelated up to that dependence when the frames' noise is independent, as before
alignment (for noise correlated between frames, warping moves the correlated part by the flow, so the measured
correlation matches the drawn one only where the scene holds still). The dependence is largest where the frames
hold no structure to pin the flow, which then follows the noise: on two frames of pure independent noise the
warped neighbour correlated 0.08 to 0.10 with the centre frame's noise with the flow estimated on the raw frames,
0.05 to 0.07 with the 1-pixel smoothing (one draw each at 48 x 48 and 192 x 256). A model trained on pure noise
stacks with the raw-frame flow copied 5 % of the centre frame's noise (least-squares slope 0.05, correlation
0.22), with the smoothing 1 % (0.01, 0.08): hence the smoothing. The zero-motion test reads the centre frame too,
pooled over the same window, and holds most of such frames at zero motion, where the neighbour is taken unwarped
and carries none of the centre frame's noise: on pure independent noise it held 72 % of the pixels at zero, and
the aligned neighbour's correlation with the centre frame's noise went from 0.067 to 0.038 (mean of 8 draws of 192
x 256; 0.072 to 0.047 at 48 x 48). With flow reuse, the flow to a frame two away reads the centre frame only through
its first step (the second runs between two neighbours): on three frames of pure independent noise that neighbour
correlated 0.001 with the centre frame's noise, against 0.031 with its flow estimated directly (mean of 4 draws of
192 x 256). The tests train on pure noise stacks with alignment on and check that the output is about the mean
(tests/test_recorrupted_stack.py, tests/test_stack_training.py).

Resampling at a fractional shift mixes neighbouring pixels, so a warped neighbour's noise is weaker and spatially
correlated (less so with the cubic spline than bilinearly, and not at all where the flow is zero); training and run
time warp with the same function, so the model learns on the inputs it meets.
"""
from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
from scipy import ndimage
from skimage.transform import pyramid_reduce, warp

from grainwright.inference.images.shift_alignment import DominantShifts

# The values of model.align_neighbours and of the exported "stack" entry: "dominant-shifts" is the cheaper
# alignment of grainwright.inference.images.shift_alignment.
ALIGNMENTS = ("none", "optical-flow", "dominant-shifts")
FLOW_SMOOTHING = 1.0  # pixels; standard deviation of the Gaussian both frames are smoothed with for the flow only
FLOW_RADIUS = 7  # pixels; the radius of the Lucas-Kanade window (scikit-image's default), measured best of 3 / 7 / 11
COARSE_WARPS = 10  # Lucas-Kanade iterations on each coarser pyramid level (scikit-image's default)
FINEST_WARPS = 5  # Lucas-Kanade iterations at full resolution (10 before; measured, docs/benchmarks.md)
PYRAMID_MIN_SIZE = 16  # pixels; the coarsest pyramid level is the last whose shorter side exceeds twice this
# The flow's median filter samples its (2 * FLOW_RADIUS + 1)-pixel window on a 5 x 5 grid of these offsets (25 values
# instead of 225: 3 to 4 times cheaper, measured as good; docs/benchmarks.md).
MEDIAN_OFFSETS = (-7, -4, 0, 4, 7)
# The revision of the optical-flow alignment, recorded with a model trained on it (the exported "stack" entry's
# "align_revision"): 1 was scikit-image's optical_flow_ilk with 10 iterations at every level and a dense 15 x 15
# median, 2 this module's solver with FINEST_WARPS and the sampled median, the flow to every neighbour estimated
# directly; 3 estimates it only between frames one window spacing apart and composes those steps for the neighbours
# further away (AlignedNeighbours). A runtime refuses another revision. "dominant-shifts" has its own revisions.
ALIGN_REVISIONS = {"optical-flow": 3, "dominant-shifts": 1}
STILL_MARGIN = 0.1  # the zero-motion test's margin: zero motion kept where its residual is within 10 % of the flow's
WARP_ORDER = 3  # the spline order of the resampling: cubic (measured against bilinear, order 1, docs/benchmarks.md)


def _flow_images(centre: np.ndarray, neighbour: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Both frames ``(H, W, C)`` as single-channel float32, mapped together so that the centre frame's 0.5th and
    99.5th percentiles are 0 and 1 (the flow is then independent of linear units)."""
    centre_mean = np.asarray(centre, np.float32).mean(axis=2)
    neighbour_mean = np.asarray(neighbour, np.float32).mean(axis=2)
    low, high = np.percentile(centre_mean, [0.5, 99.5])
    scale = np.float32(1.0 / (high - low)) if high > low else np.float32(1.0)
    return (centre_mean - np.float32(low)) * scale, (neighbour_mean - np.float32(low)) * scale


def neighbour_flow(centre: np.ndarray, neighbour: np.ndarray) -> np.ndarray:
    """The dense motion from ``centre`` to ``neighbour`` (both ``(H, W, C)``), estimated on the noisy frames by
    iterative Lucas-Kanade (:func:`lucas_kanade_flow`, radius ``FLOW_RADIUS``, on the frames smoothed by
    ``FLOW_SMOOTHING`` pixels), set to zero where the zero-motion test (:func:`held_still`) finds no motion told
    apart from noise, then median-filtered over the Lucas-Kanade window (:func:`sampled_median`).

    Returns
    -------
    ndarray
        ``(2, H, W)`` float32: the row and column displacement, in pixels, at which each centre pixel is found in
        the neighbour.
    """
    reference, moving = _flow_images(centre, neighbour)
    smoothed = (ndimage.gaussian_filter(image, FLOW_SMOOTHING) for image in (reference, moving))
    flow = lucas_kanade_flow(*smoothed)
    flow[:, held_still(reference, moving, flow)] = 0.0
    return sampled_median(flow)


def sampled_median(flow: np.ndarray) -> np.ndarray:
    """Each component of ``flow`` ``(2, H, W)`` median-filtered over the Lucas-Kanade window,
    ``(2 * FLOW_RADIUS + 1)`` pixels square, sampled at the 5 x 5 offsets ``MEDIAN_OFFSETS`` (edges repeated).
    The 25 samples of every pixel are stacked and the middle one selected (``numpy.partition``): the same values as
    ``scipy.ndimage.median_filter`` with that footprint, in about two thirds of its time."""
    reach = max(abs(offset) for offset in MEDIAN_OFFSETS)
    height, width = flow.shape[1:]
    padded = np.pad(np.asarray(flow, np.float32), ((0, 0), (reach, reach), (reach, reach)), mode="edge")
    result = np.empty((2, height, width), np.float32)
    for component in range(2):
        samples = np.stack([padded[component, reach + dy:reach + dy + height, reach + dx:reach + dx + width]
                            for dy in MEDIAN_OFFSETS for dx in MEDIAN_OFFSETS])
        middle = len(samples) // 2
        samples.partition(middle, axis=0)
        result[component] = samples[middle]
    return result


def _pyramid(image: np.ndarray) -> list[np.ndarray]:
    """``image`` and its reductions by 2 (``skimage.transform.pyramid_reduce``: Gaussian smoothing, then
    resampling), coarsest first, down to the last level whose shorter side exceeds ``2 * PYRAMID_MIN_SIZE``."""
    levels = [image]
    while min(levels[-1].shape) > 2 * PYRAMID_MIN_SIZE and len(levels) < 10:
        levels.append(pyramid_reduce(levels[-1], 2, channel_axis=None).astype(np.float32))
    return levels[::-1]


def _refine(reference: np.ndarray, moving: np.ndarray, flow: np.ndarray, warps: int) -> np.ndarray:
    """``warps`` iterations of Lucas-Kanade on one pyramid level: ``moving`` warped by the current ``flow``
    (bilinear), the brightness-constancy equation linearised about it, and its least-squares solution over each
    ``(2 * FLOW_RADIUS + 1)``-pixel window solved in closed form (a 2 x 2 system per pixel; left at zero where the
    system is singular)."""
    rows, cols = np.meshgrid(np.arange(reference.shape[0], dtype=np.float32),
                             np.arange(reference.shape[1], dtype=np.float32), indexing="ij", sparse=True)

    def window_mean(values: np.ndarray) -> np.ndarray:  # scikit-image's windows: uniform, mirrored at the edges
        return ndimage.uniform_filter(values, 2 * FLOW_RADIUS + 1, mode="mirror")

    for _ in range(warps):
        moved = warp(moving, np.stack([flow[0] + rows, flow[1] + cols]), order=1, mode="edge")
        grad_rows, grad_cols = np.gradient(moved)
        error = grad_rows * flow[0] + grad_cols * flow[1] + reference - moved
        a, b, c = window_mean(grad_rows**2), window_mean(grad_rows * grad_cols), window_mean(grad_cols**2)
        e, f = window_mean(grad_rows * error), window_mean(grad_cols * error)
        determinant = a * c - b * b
        singular = np.abs(determinant) < 1e-14
        determinant[singular] = 1.0
        flow = np.stack([(c * e - b * f) / determinant, (a * f - b * e) / determinant]).astype(np.float32)
        flow[:, singular] = 0.0
    return flow


def lucas_kanade_flow(reference: np.ndarray, moving: np.ndarray) -> np.ndarray:
    """The dense flow ``(2, H, W)`` float32 from ``reference`` to ``moving`` (both ``(H, W)`` float32) by
    coarse-to-fine iterative Lucas-Kanade (Lucas and Kanade 1981; the iterated local window registration of Le
    Besnerais and Champagnat, ICIP 2005, Table 2, as scikit-image's ``optical_flow_ilk`` implements it): on a
    pyramid of reductions by 2, ``COARSE_WARPS`` iterations per coarser level and ``FINEST_WARPS`` at full
    resolution, each level starting from the coarser one's flow (nearest-neighbour upsampled, values scaled).
    Window radius ``FLOW_RADIUS``. The 2 x 2 systems are solved in closed form, about three times faster than
    scikit-image's general solver for the same result up to float32 rounding (tests/test_alignment.py compares
    them)."""
    levels = list(zip(_pyramid(reference), _pyramid(moving)))
    flow = np.zeros((2, *levels[0][0].shape), np.float32)
    for index, (level_reference, level_moving) in enumerate(levels):
        if index:
            scale = [new / old for new, old in zip(level_reference.shape, flow.shape[1:])]
            flow = ndimage.zoom(flow, [1, *scale], order=0, mode="nearest", prefilter=False)
            flow *= np.asarray(scale, np.float32)[:, None, None]
        warps = FINEST_WARPS if index == len(levels) - 1 else COARSE_WARPS
        flow = _refine(level_reference, level_moving, flow, warps)
    return flow


def _displaced_positions(flow: np.ndarray) -> np.ndarray:
    """The pixel positions ``(2, H, W)`` of the centre frame plus ``flow`` ``(2, H, W)``: where each centre pixel is
    sampled in the neighbour (the coordinate map of ``skimage.transform.warp``)."""
    height, width = flow.shape[1:]
    rows, cols = np.meshgrid(np.arange(height, dtype=np.float32), np.arange(width, dtype=np.float32), indexing="ij")
    return np.stack([rows + flow[0], cols + flow[1]])


def held_still(reference: np.ndarray, moving: np.ndarray, flow: np.ndarray) -> np.ndarray:
    """Where zero motion explains ``moving`` as well as ``flow`` does (a boolean ``(H, W)`` map): the zero-motion
    test. ``reference`` and ``moving`` are the centre frame and the neighbour ``(H, W)`` as mapped for the flow
    (unsmoothed), ``flow`` ``(2, H, W)`` the Lucas-Kanade flow in pixels.

    Both residuals against ``reference`` are mean squares over the Lucas-Kanade window, ``(2 * FLOW_RADIUS + 1)^2``
    pixels: ``moving`` as it is, and ``moving`` shifted by ``flow`` rounded to whole pixels (a shift by whole pixels
    moves pixels without mixing them, so the noise in both residuals is the same, twice the frames' variance, and
    only structure that did move makes them differ). Zero motion is kept where its residual is at most
    ``1 + STILL_MARGIN`` times the other: the flow there is not told apart from noise. A window mean of 225
    squared differences of independent Gaussian noise has a relative spread of sqrt(2 / 225), about 0.09, hence
    the margin (our choice; 0 held half as many still pixels on the conveyor sequence, docs/benchmarks.md)."""
    shifted = warp(moving, _displaced_positions(np.rint(flow)), order=0, mode="edge", preserve_range=True)
    window = 2 * FLOW_RADIUS + 1
    unmoved = ndimage.uniform_filter((moving - reference) ** 2, window)
    return unmoved <= (1.0 + STILL_MARGIN) * ndimage.uniform_filter((shifted - reference) ** 2, window)


def warp_onto_centre(neighbour: np.ndarray, flow: np.ndarray) -> np.ndarray:
    """``neighbour`` ``(H, W, C)`` resampled at the centre frame's positions plus ``flow`` ``(2, H, W)``: cubic
    spline, edge pixels repeated beyond the frame (``skimage.transform.warp``, order ``WARP_ORDER``,
    ``mode="edge"``, values clipped to the neighbour's range as scikit-image does by default).
    Returns float32 in the neighbour's units."""
    coordinates = _displaced_positions(flow)
    values = np.asarray(neighbour, np.float32)
    return np.stack([warp(values[..., channel], coordinates, order=WARP_ORDER, mode="edge", preserve_range=True)
                     for channel in range(values.shape[2])], axis=2).astype(np.float32)


def align_to_centre(centre: np.ndarray, neighbour: np.ndarray) -> np.ndarray:
    """``neighbour`` ``(H, W, C)`` warped onto ``centre`` by the optical flow between the two noisy frames."""
    return warp_onto_centre(neighbour, neighbour_flow(centre, neighbour))


def recorded_revision(record: dict) -> int | None:
    """The alignment revision a training summary or exported ``stack`` entry records: None when its neighbours are
    not aligned (``align_neighbours`` absent or ``"none"``), 1 when aligned but written before revisions were
    recorded."""
    if record.get("align_neighbours", "none") == "none":
        return None
    return int(record.get("align_revision", 1))


def check_alignment(value: str, where: str) -> str:
    """``value`` if it is one of ``ALIGNMENTS``; else ``ValueError`` naming ``where`` and the known values."""
    if value not in ALIGNMENTS:
        raise ValueError(f"{where} is {value!r}, not one of {', '.join(ALIGNMENTS)}")
    return value


def aligned_frames(frames: np.ndarray | list[np.ndarray], positions: np.ndarray, alignment: str,
                   warped: Callable[[int, int], np.ndarray] | None = None) -> list[np.ndarray]:
    """The frames ``positions`` (a window's stack indices, centre in the middle) of ``frames``, each ``(H, W, C)``,
    with every neighbour aligned to the centre frame when ``alignment`` is not ``"none"``.

    ``warped(centre_index, neighbour_index)``, when given, returns the aligned neighbour instead (an
    :class:`AlignedNeighbours` kept across windows, so that each step's flow is estimated once; without it, one for
    this window, whose steps are those of consecutive frames); a neighbour that is the centre frame itself (a short
    stack's reflection) is taken as it is.
    """
    check_alignment(alignment, "the neighbour alignment")
    centre = int(positions[len(positions) // 2])
    if alignment == "none":
        return [frames[int(position)] for position in positions]
    fetch = warped or AlignedNeighbours(frames, alignment=alignment)  # a reflected window holds a neighbour twice
    return [frames[centre] if int(position) == centre else fetch(centre, int(position)) for position in positions]


def compose_flows(first: np.ndarray, second: np.ndarray) -> np.ndarray:
    """The flow of two motions in turn: ``first`` ``(2, H, W)`` from frame a to frame b, ``second`` from b to c;
    returns the flow from a to c, ``first(x) + second(x + first(x))``, with ``second`` sampled bilinearly
    (``scipy.ndimage.map_coordinates``, order 1, edge values repeated beyond the frame). Where ``first`` is zero the
    result is ``second`` itself, so a pixel held still in both steps stays exactly still."""
    positions = _displaced_positions(first)
    carried = np.stack([ndimage.map_coordinates(component, positions, order=1, mode="nearest")
                        for component in second])
    return (first + carried).astype(np.float32)


def flow_steps(centre: int, neighbour: int, stride: int = 1) -> list[tuple[int, int]]:
    """The frame pairs whose flows, composed in turn, give the flow from frame ``centre`` to frame ``neighbour``:
    steps of ``stride`` frames towards the neighbour (the window's spacing), the last one shorter if the distance is
    not a multiple of it."""
    direction = 1 if neighbour > centre else -1
    stops = [*range(centre, neighbour, direction * stride), neighbour]
    return list(zip(stops, stops[1:]))


class OpticalFlowSteps:
    """The steps of :class:`AlignedNeighbours` by optical flow: :func:`neighbour_flow` between two frames,
    :func:`compose_flows`, :func:`warp_onto_centre`."""

    def __init__(self, frames: np.ndarray | dict[int, np.ndarray]):
        self.frames = frames

    def step(self, start: int, end: int) -> np.ndarray:
        return neighbour_flow(self.frames[start], self.frames[end])

    compose = staticmethod(compose_flows)

    def warp(self, neighbour: int, flow: np.ndarray) -> np.ndarray:
        return warp_onto_centre(self.frames[neighbour], flow)

    def forget(self, kept: set[int]) -> None:
        """Nothing of its own to drop: the estimates are kept by :class:`AlignedNeighbours`."""


class AlignedNeighbours:
    """The neighbours of a stack's frames (an ``(N, H, W, C)`` array, or frames ``(H, W, C)`` by index) aligned to
    their centre frames, float32, by ``alignment`` (``"optical-flow"``: :class:`OpticalFlowSteps`;
    ``"dominant-shifts"``: :class:`grainwright.inference.images.shift_alignment.DominantShifts`). Flow reuse: the
    motion is estimated only between frames ``stride`` apart, the spacing of a window's frames (consecutive frames
    at run time), each such step once in each direction and kept while it is needed; the motion to a neighbour
    further away is those steps composed (:func:`flow_steps`), so a K = 5 window costs two estimates per output
    frame instead of four. Every value depends only on the frames it is computed from, never on which window asked
    first, so a stack cut into chunks gives the same windows as the whole stack."""

    def __init__(self, frames: np.ndarray | dict[int, np.ndarray], stride: int = 1,
                 alignment: str = "optical-flow"):
        check_alignment(alignment, "the neighbour alignment")
        if alignment == "none":
            raise ValueError("AlignedNeighbours needs an alignment other than none")
        self.method = OpticalFlowSteps(frames) if alignment == "optical-flow" else DominantShifts(frames)
        self.stride = stride
        # A motion is whatever the steps object makes: a dense flow, or a ShiftField.
        self._steps: dict[tuple[int, int], Any] = {}  # (from, to): motion estimated between the two frames
        self._flows: dict[tuple[int, int], Any] = {}  # (centre, neighbour): the composed motion
        self._warped: dict[tuple[int, int], np.ndarray] = {}

    def step(self, start: int, end: int) -> Any:
        """The motion estimated from frame ``start`` to frame ``end`` (each ordered pair once)."""
        if (start, end) not in self._steps:
            self._steps[start, end] = self.method.step(start, end)
        return self._steps[start, end]

    def flow(self, centre: int, neighbour: int) -> Any:
        """The motion from frame ``centre`` to frame ``neighbour``: one step, or the steps towards it composed, the
        motion to the frame before it first (``flow(c, n) = compose(flow(c, previous), step(previous, n))``)."""
        if (centre, neighbour) not in self._flows:
            steps = flow_steps(centre, neighbour, self.stride)
            previous, _ = steps[-1]
            self._flows[centre, neighbour] = (self.step(centre, neighbour) if len(steps) == 1 else
                                              self.method.compose(self.flow(centre, previous),
                                                                  self.step(*steps[-1])))
        return self._flows[centre, neighbour]

    def __call__(self, centre: int, neighbour: int) -> np.ndarray:
        key = (centre, neighbour)
        if key not in self._warped:
            self._warped[key] = self.method.warp(neighbour, self.flow(centre, neighbour))
        return self._warped[key]

    def forget(self, kept: set[int], centre: int) -> None:
        """Drop what the windows still to come do not need (the runtime's bounded memory): steps leaving or reaching
        a frame outside ``kept``, and the flows and aligned neighbours of any centre frame other than ``centre``."""
        for key in [key for key in self._steps if not set(key) <= kept]:
            del self._steps[key]
        for table in (self._flows, self._warped):
            for key in [key for key in table if key[0] != centre]:
                del table[key]
        self.method.forget(kept)
