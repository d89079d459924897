"""How large an image may be decoded whole: checked on the size a file's header declares, before any pixel is
decoded, so that a small hostile file (a "decompression bomb") cannot exhaust memory.

Two limits, each raised by an environment variable (read at every check, so a wrapper script or a service can
set it per process):

- ``GRAINWRIGHT_MAX_PIXELS``: the largest frame (height x width, any channel count) read whole. The default,
  89,478,485 pixels, is Pillow's own decompression-bomb threshold (``PIL.Image.MAX_IMAGE_PIXELS``,
  ``2**30 // 4 // 3``: a quarter GiB of 8-bit RGB), so every format meets the limit Pillow applies to PNG.
- ``GRAINWRIGHT_MAX_DECODED_MB``: the whole file decoded (every frame and channel, native dtype), in MiB
  (2**20 bytes); default 4096, our choice (processing adds float32 copies, so a few times below the memory of
  a plant workstation). A stack of frames passes the first limit frame by frame and meets this one in total.

Files over a limit are refused with one line naming the file and its declared size, except on the streamed
paths that read only part of a large file (``denoise`` reads a tiled or striped TIFF in bands, ``inspect`` reads
the central crop of such a TIFF or of a ``.npy`` file); a TIFF whose single strip or tile would exceed the frame
limit is not read piecewise (:mod:`grainwright.inference.images.large_tiff`), so it meets the limits whole.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from grainwright.inference.common.errors import ConfigError, InputError

PIXELS_VARIABLE = "GRAINWRIGHT_MAX_PIXELS"
DECODED_VARIABLE = "GRAINWRIGHT_MAX_DECODED_MB"
# Pillow's default decompression-bomb threshold (PIL.Image.MAX_IMAGE_PIXELS = 1024 * 1024 * 1024 // 4 // 3);
# tests/test_limits.py checks the installed Pillow still uses it.
DEFAULT_MAX_PIXELS = 1024 * 1024 * 1024 // 4 // 3
DEFAULT_MAX_DECODED_MB = 4096


@dataclass(frozen=True)
class ImageLimits:
    """The limits in force: pixels per frame and decoded bytes per file."""

    max_pixels: int
    max_decoded_bytes: int


def _positive(variable: str, default: int) -> int:
    text = os.environ.get(variable, "").strip().replace("_", "")
    if not text:
        return default
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise ConfigError(f"environment variable {variable} must be a positive whole number, got "
                          f"{os.environ[variable]!r}")
    return value


def current_limits() -> ImageLimits:
    """The limits from the environment (or the defaults)."""
    return ImageLimits(
        max_pixels=_positive(PIXELS_VARIABLE, DEFAULT_MAX_PIXELS),
        max_decoded_bytes=_positive(DECODED_VARIABLE, DEFAULT_MAX_DECODED_MB) * 2**20,
    )


def describe_size(height: int, width: int, channels: int, dtype: np.dtype, frames: int = 1) -> str:
    """``60000 x 60000 pixels, 1 channel, uint16 (3600.0 megapixels, 6.7 GiB decoded)``."""
    dtype = np.dtype(dtype)
    decoded = frames * height * width * channels * dtype.itemsize
    stack = f"{frames} frames of " if frames > 1 else ""
    return (f"{stack}{height} x {width} pixels, {channels} channel{'s' if channels != 1 else ''}, {dtype.name} "
            f"({height * width / 1e6:.1f} megapixels, {decoded / 2**30:.1f} GiB decoded)")


def within_limits(height: int, width: int, channels: int, dtype: np.dtype | str, frames: int = 1) -> bool:
    """Whether a file of this declared size may be decoded whole."""
    limits = current_limits()
    decoded = frames * height * width * channels * np.dtype(dtype).itemsize
    return height * width <= limits.max_pixels and decoded <= limits.max_decoded_bytes


def check_declared_size(path: str | Path, height: int, width: int, channels: int, dtype: np.dtype | str,
                        frames: int = 1, *, streamable: bool | None = False) -> None:
    """Refuse, before decoding, a file whose header declares more than the limits allow.

    Parameters
    ----------
    path : path
        The file, named in the error.
    height, width, channels : int
        One frame's declared size in pixels and samples per pixel.
    dtype : dtype
        The decoded sample type.
    frames : int
        Frames (pages) in the file.
    streamable : bool or None
        The file could be read piecewise (a tiled or striped TIFF): the message says so; False suggests a tiled
        TIFF; None says neither (a stack, read a whole frame at a time).

    Raises
    ------
    InputError
        One line naming the file, its declared size and how to raise the limit.
    """
    if within_limits(height, width, channels, dtype, frames):
        return
    limits = current_limits()
    dtype = np.dtype(dtype)
    if height * width > limits.max_pixels:
        over = (f"over the limit of {limits.max_pixels:,} pixels per image read whole "
                f"(raise it with the environment variable {PIXELS_VARIABLE})")
    else:
        over = (f"over the limit of {limits.max_decoded_bytes / 2**20:.0f} MiB decoded per file "
                f"(raise it with the environment variable {DECODED_VARIABLE})")
    streamed = {True: "; denoise reads it in bands and inspect its central crop",
                False: "; save it as a tiled TIFF to have it read piecewise", None: ""}[streamable]
    raise InputError(path, f"declares {describe_size(height, width, channels, dtype, frames)}, {over}{streamed}")
