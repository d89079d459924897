"""Centre crops: the one place that decides where the central ``edge`` x ``edge`` window of an image lies.

The window starts at ``(size - edge) // 2`` along each axis (rounded down, so an odd surplus leaves the extra
pixel after the window), at 0 when the image is smaller than ``edge`` (which then keeps the whole axis).
"""
from __future__ import annotations

import numpy as np


def centre_box(height: int, width: int, edge: int) -> tuple[slice, slice]:
    """The rows and the columns of the central window of at most ``edge`` x ``edge`` pixels of a
    ``height`` x ``width`` image, clipped to the image."""
    top, left = max(0, (height - edge) // 2), max(0, (width - edge) // 2)
    return slice(top, min(height, top + edge)), slice(left, min(width, left + edge))


def centre_crop(image: np.ndarray, edge: int, *, channels_first: bool = False) -> np.ndarray:
    """The central window of at most ``edge`` x ``edge`` pixels of ``image`` (a view, not a copy).

    ``image`` is ``(H, W, ...)``, or ``(..., H, W)`` with ``channels_first``.
    """
    if channels_first:
        rows, cols = centre_box(*image.shape[-2:], edge)
        return image[..., rows, cols]
    rows, cols = centre_box(*image.shape[:2], edge)
    return image[rows, cols]
