"""Seamless tiling: split an image into overlapping windows whose kept centres reassemble the whole-image result.

The rule, also written into every exported model's metadata so that a program in another language can follow it:

1. Pad the image at the bottom and right to the model's *alignment* (a multiple of ``alignment`` pixels in each
   direction) by reflection (``numpy.pad(mode="reflect")``, repeated for images smaller than the padding). A
   whole-image run pads the same way, so both see the same pixels.
2. Cut the padded image into kept (valid) rectangles of ``tile`` pixels whose origins lie on the alignment grid.
3. Run each kept rectangle with ``margin`` extra pixels around it, where ``margin`` is at least the receptive-field
   radius and a multiple of the alignment. A window is never extended beyond the padded image: at an image
   border the network's own zero padding then happens at the same place as in a whole-image run. Near the
   borders the window is shifted inwards so that every window has the same shape, which lets tiles be batched.
4. Keep only the kept rectangle of each output. Every kept pixel is then either at least ``margin`` pixels from the
   window edge or on the same image border as in the whole-image run, so its value equals the whole-image value
   up to floating-point rounding. Crop the padding away at the end.

A convolutional network is translation-equivariant for shifts by multiples of its alignment (pooling grids stay
in phase), and a pixel depends only on inputs within its receptive-field radius, which is what makes the rule
exact (the overlap-save principle of block convolution; Oppenheim & Schafer, *Discrete-Time Signal Processing*).
"""
from __future__ import annotations

import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from itertools import islice
from typing import TypeVar

import numpy as np

# The smallest default kept edge (pixels), measured with `grainwright bench runtime` (docs/benchmarks.md, runtime):
# 512 was the fastest of 128, 256 and 512 for the default `residual` model in every interleaved repetition, and a
# window's activations stay modest (48 channels x 4 B x 532^2 pixels = 54 MB per layer at margin 10).
MIN_DEFAULT_TILE = 512
# Overlap may cost at most this fraction of extra computed pixels at the default tile size.
MAX_OVERLAP_COST = 0.15
# TIFF tiles must be multiples of 16 pixels (TIFF 6.0, section 15); keeping the kept edge on that grid lets the
# streaming writer emit one TIFF tile per kept square.
TIFF_TILE_MULTIPLE = 16

T = TypeVar("T")


def round_up(value: int, multiple: int) -> int:
    """Smallest multiple of ``multiple`` that is >= ``value``."""
    return -(-int(value) // int(multiple)) * int(multiple)


def tile_margin(receptive_field: int, alignment: int = 1) -> int:
    """Overlap in pixels for a receptive field (odd edge, pixels): its radius rounded up to the alignment."""
    return round_up((int(receptive_field) - 1) // 2, alignment)


def overlap_cost(tile: int, margin: int) -> float:
    """Extra computed pixels per kept pixel for an interior tile: ((tile + 2 margin) / tile)^2 - 1."""
    return ((tile + 2 * margin) / tile) ** 2 - 1.0


def default_tile(margin: int, alignment: int = 1, multiple: int = TIFF_TILE_MULTIPLE) -> int:
    """Default kept edge in pixels: at least ``MIN_DEFAULT_TILE``, and large enough that overlap costs at most
    ``MAX_OVERLAP_COST`` (so it grows with the margin), on the grid of ``lcm(alignment, multiple)``."""
    needed = 2 * margin / (math.sqrt(1.0 + MAX_OVERLAP_COST) - 1.0)
    step = math.lcm(int(alignment), int(multiple))
    return round_up(max(MIN_DEFAULT_TILE, math.ceil(needed)), step)


def balanced_tile(padded: int, largest: int, step: int = 1) -> int:
    """Kept edge for one axis of ``padded`` pixels: as many tiles as ``largest`` needs, evened out on the grid of
    ``step`` so that the last tile is not mostly wasted (every window has the full shape, see ``plan_tiles``)."""
    count = -(-int(padded) // round_up(largest, step))
    return round_up(-(-int(padded) // count), step)


def reflect_indices(count: int, size: int) -> np.ndarray:
    """Source indices of positions ``0 .. count-1`` of a signal of ``size`` samples extended by reflection.

    Same values as ``numpy.pad(mode="reflect")`` (the edge sample is not repeated), applied as often as needed;
    a one-sample signal repeats its sample.
    """
    positions = np.arange(count)
    if size == 1:
        return np.zeros(count, dtype=np.intp)
    period = 2 * (size - 1)
    folded = positions % period
    return np.where(folded < size, folded, period - folded).astype(np.intp)


def pad_to_alignment(image: np.ndarray, alignment: int) -> np.ndarray:
    """Pad an ``(H, W, C)`` image at the bottom and right to multiples of ``alignment`` by reflection."""
    height, width = image.shape[:2]
    rows = reflect_indices(round_up(height, alignment), height)
    cols = reflect_indices(round_up(width, alignment), width)
    return image[rows][:, cols]


@dataclass(frozen=True)
class Tile:
    """One window of the padded image and the part of its output that is kept.

    ``window`` is ``(y0, y1, x0, x1)`` in padded-image pixels; ``keep`` is ``(y0, y1, x0, x1)`` in the same
    coordinates, already cropped to the original image. ``row`` and ``col`` number the kept rectangles.
    """

    row: int
    col: int
    window: tuple[int, int, int, int]
    keep: tuple[int, int, int, int]

    def keep_in_window(self) -> tuple[slice, slice]:
        """Slices of the kept rectangle inside the window's output."""
        y0, y1, x0, x1 = self.keep
        return slice(y0 - self.window[0], y1 - self.window[0]), slice(x0 - self.window[2], x1 - self.window[2])


def _axis_windows(size: int, padded: int, tile: int, margin: int) -> list[tuple[int, int, int, int]]:
    """(window start, window end, keep start, keep end) along one axis."""
    span = min(tile + 2 * margin, padded)
    spans = []
    for start in range(0, padded, tile):
        window_start = max(0, min(start - margin, padded - span))
        spans.append((window_start, window_start + span, start, min(start + tile, size)))
    return spans


@dataclass(frozen=True)
class TilePlan:
    """All tiles of one image, row-major. Every window has the same ``window_shape``."""

    height: int
    width: int
    padded_height: int
    padded_width: int
    tile: tuple[int, int]
    margin: int
    alignment: int
    tiles: tuple[Tile, ...]

    @property
    def window_shape(self) -> tuple[int, int]:
        y0, y1, x0, x1 = self.tiles[0].window
        return y1 - y0, x1 - x0

    @property
    def rows(self) -> int:
        return self.tiles[-1].row + 1

    @property
    def computed_pixels(self) -> int:
        """Pixels the network computes for this image (all windows)."""
        height, width = self.window_shape
        return height * width * len(self.tiles)


def plan_tiles(
    height: int, width: int, *, tile: int, margin: int, alignment: int = 1, step: int | None = None
) -> TilePlan:
    """Plan the tiles of an ``height`` x ``width`` image.

    Parameters
    ----------
    height, width : int
        Image size in pixels (before padding).
    tile : int
        Largest edge of the kept rectangles in pixels. Along each axis the plan uses as many tiles as this edge
        needs and evens their edges out (``balanced_tile``), so the last tile is not mostly wasted. Larger than
        the image means one tile.
    margin : int
        Overlap in pixels on each side; must be a multiple of ``alignment`` and at least the receptive-field
        radius of the model.
    alignment : int
        The model's input height and width must be multiples of this.
    step : int, optional
        Kept edges are multiples of this (default: ``alignment``; it must be a multiple of it), e.g. 16 so that
        kept rectangles can be written as TIFF tiles.
    """
    if height < 1 or width < 1:
        raise ValueError(f"image must be at least 1 x 1 pixels, got {height} x {width}")
    if alignment < 1 or margin < 0 or margin % alignment:
        raise ValueError(f"margin {margin} must be a non-negative multiple of the alignment {alignment}")
    step = step or alignment
    if tile < 1 or step % alignment:
        raise ValueError(f"tile ({tile}) must be at least 1 pixel, step ({step}) a multiple of {alignment}")
    padded_height, padded_width = round_up(height, alignment), round_up(width, alignment)
    tile = (balanced_tile(padded_height, tile, step), balanced_tile(padded_width, tile, step))
    row_spans = _axis_windows(height, padded_height, tile[0], margin)
    col_spans = _axis_windows(width, padded_width, tile[1], margin)
    tiles = tuple(
        Tile(row=r, col=c, window=(wy0, wy1, wx0, wx1), keep=(ky0, ky1, kx0, kx1))
        for r, (wy0, wy1, ky0, ky1) in enumerate(row_spans)
        for c, (wx0, wx1, kx0, kx1) in enumerate(col_spans)
    )
    return TilePlan(height, width, padded_height, padded_width, tile, margin, alignment, tiles)


def batched(items: Iterable[T], size: int) -> Iterator[list[T]]:
    """Consecutive lists of ``size`` items (the last one may be shorter)."""
    iterator = iter(items)
    while chunk := list(islice(iterator, size)):
        yield chunk
