"""Slide a multi-frame model's window of K frames along a stack, in bounded memory, with the usual x/y tiling.

Output frame ``i`` of an ``N``-frame stack is computed from frames ``i - r .. i + r`` (``r = K // 2``). At the
ends of the stack the missing neighbours are taken by mirror reflection about the end frame, without repeating
it (``numpy.pad`` mode ``"reflect"``): with K = 5, frame 0 reads frames ``2, 1, 0, 1, 2`` and frame ``N - 1``
reads ``N - 3, N - 2, N - 1, N - 2, N - 3``. A stack needs at least K frames, so one reflection always suffices.

Frames are read once each, in order, and at most K of them are held, so a 2,000-slice volume needs no more memory
than a 200-slice one. Within a frame, the window of K frames is tiled in x and y exactly like a single image
(:mod:`grainwright.inference.runtime.tiling`); both rules are exact, so any split of a stack into chunks of
output frames (each chunk reading the ``r`` frames beyond its ends) gives the same result as the whole stack.

A model whose ``stack`` entry says ``align_neighbours = "optical-flow"`` or ``"dominant-shifts"`` gets each
window's neighbours moved onto its centre frame first (:mod:`grainwright.inference.images.alignment`, the class the
trainer uses): the motion is estimated between consecutive frames only, each such step kept while both its frames
are in the window, and composed for the frames two away. A step depends on its two whole frames only, and a
composed motion on its steps, so chunked still equals whole; the kept steps are bounded by the window, as the
frames are.
"""
from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np

from grainwright.inference.common.errors import InputError
from grainwright.inference.images.alignment import AlignedNeighbours, aligned_frames
from grainwright.inference.runtime.runner import OnnxDenoiser
from grainwright.inference.runtime.tiling import pad_to_alignment


def window_indices(index: int, count: int, frames: int) -> np.ndarray:
    """Frames read for output frame ``index`` of a ``count``-frame stack by a ``frames``-frame window.

    ``index - r .. index + r`` with ``r = frames // 2``, reflected at the ends without repeating the end frame
    (``numpy.pad(mode="reflect")``). Needs ``count >= frames``.
    """
    if frames % 2 == 0 or frames < 1:
        raise ValueError(f"the window must hold an odd number of frames, got {frames}")
    if count < frames:
        raise ValueError(f"a {frames}-frame window needs at least {frames} frames, the stack has {count}")
    if not 0 <= index < count:
        raise ValueError(f"frame {index} outside 0..{count - 1}")
    radius = frames // 2
    positions = np.abs(np.arange(index - radius, index + radius + 1))
    return np.where(positions > count - 1, 2 * (count - 1) - positions, positions)


def sliding_windows(read: Callable[[int], np.ndarray], count: int, frames: int, start: int = 0,
                    stop: int | None = None, alignment: str = "none") -> Iterator[tuple[int, np.ndarray]]:
    """Yield ``(i, window)`` for output frames ``start .. stop - 1``; ``window`` is ``(H, W, K * C)``, the K
    frames of :func:`window_indices` side by side along the channels (frame-major, as the models take them).
    An ``alignment`` other than ``"none"`` moves the neighbours onto the centre frame
    (:func:`grainwright.inference.images.alignment.aligned_frames`, as in training; float32 then).

    ``read(j)`` returns frame ``j`` as ``(H, W, C)``; each frame is read once and at most K are held.
    """
    stop = count if stop is None else stop
    held: dict[int, np.ndarray] = {}
    aligned = AlignedNeighbours(held, alignment=alignment) if alignment != "none" else None  # steps reused while held
    for index in range(start, stop):
        wanted = window_indices(index, count, frames)
        for key in [key for key in held if key not in wanted]:
            del held[key]
        for key in sorted(set(wanted.tolist())):
            if key not in held:
                held[int(key)] = np.asarray(read(int(key)))
        if aligned is not None:
            aligned.forget(set(held), index)
        yield index, np.concatenate(aligned_frames(held, wanted, alignment, aligned), axis=2)


def check_stack(denoiser: OnnxDenoiser, count: int, channels: int, path: str | Path | None = None) -> None:
    """A clear error when a stack cannot feed the model: too few frames, or the wrong channel count."""
    frames = denoiser.spec.stack_frames
    if count < frames:
        raise InputError(path, f"has {count} frame(s), fewer than the {frames} the model reads per output frame")
    denoiser.check_channels(channels, path)


def denoise_window(denoiser: OnnxDenoiser, window: np.ndarray,
                   progress: Callable[[int], Any] | None = None) -> np.ndarray:
    """The centre frame of one ``(H, W, K * C)`` window, denoised: ``(H, W, C)`` float32 native, unclipped."""
    height, width, stacked = window.shape
    channels = stacked // denoiser.spec.stack_frames
    plan = denoiser.plan(height, width)
    padded = pad_to_alignment(window, denoiser.spec.alignment)
    first = (denoiser.spec.stack_frames // 2) * channels
    level = denoiser.sigma_for(window[:, :, first:first + channels])
    result = np.empty((height, width, channels), np.float32)
    for tile, kept in denoiser.kept_tiles(plan, lambda y0, y1: padded[y0:y1], level, progress):
        y0, y1, x0, x1 = tile.keep
        result[y0:y1, x0:x1] = kept
    return result


def denoise_stack(denoiser: OnnxDenoiser, read: Callable[[int], np.ndarray], count: int, start: int = 0,
                  stop: int | None = None, progress: Callable[[int], Any] | None = None) -> Iterator[np.ndarray]:
    """Denoise output frames ``start .. stop - 1`` of a ``count``-frame stack, one at a time.

    Parameters
    ----------
    denoiser : OnnxDenoiser
        A multi-frame model (``spec.stack_frames`` K > 1).
    read : callable
        ``read(j)`` returns native frame ``j`` as ``(H, W, C)``; called once per frame needed, in order.
    count : int
        Frames in the whole stack (the window reflects at frames 0 and ``count - 1``, not at the chunk's ends).

    Yields
    ------
    ndarray
        ``(H, W, C)`` float32 native values, unclipped; convert with ``runner.to_dtype``.
    """
    frames = denoiser.spec.stack_frames
    if frames < 2:
        raise InputError(denoiser.path, "is a single-frame model; denoise the frames one by one")
    if count < frames:
        raise InputError(None, f"the stack has {count} frame(s), fewer than the {frames} the model reads")
    for _, window in sliding_windows(read, count, frames, start, stop, denoiser.spec.stack_alignment):
        yield denoise_window(denoiser, window, progress)


def denoise_stack_array(denoiser: OnnxDenoiser, stack: np.ndarray, start: int = 0,
                        stop: int | None = None) -> np.ndarray:
    """:func:`denoise_stack` on an ``(N, H, W, C)`` array in memory; returns ``(stop - start, H, W, C)`` float32."""
    stack = np.asarray(stack)
    check_stack(denoiser, stack.shape[0], stack.shape[3])
    outputs = denoise_stack(denoiser, lambda j: stack[j], stack.shape[0], start, stop)
    return np.stack(list(outputs))
