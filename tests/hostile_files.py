"""Hostile image files for the size-limit tests, made cheaply: a few hundred kilobytes on disk that declare (and
would decode to) gigabytes. Built by hand from the format specifications (PNG, W3C 2nd edition; TIFF 6.0; the
NumPy ``.npy`` format description; zlib RFC 1950 and deflate RFC 1951), so no test needs gigabytes of input.
"""
from __future__ import annotations

import struct
import zlib
from pathlib import Path

import numpy as np

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
ADLER_MODULUS = 65521  # RFC 1950, section 8.2


def zero_stream(total: int, block: int = 1 << 24) -> bytes:
    """A zlib stream that inflates to ``total`` zero bytes, made in milliseconds.

    After a full flush deflate forgets its history, so compressing the same block again gives the same bytes:
    one block is compressed and its bytes repeated. ``78 da`` is a zlib header (deflate, 32 KiB window); the
    trailer is the Adler-32 of ``total`` zeros, ``A = 1, B = total mod 65521`` (RFC 1950). ``b"\\x03\\x00"`` is an empty final block with fixed codes.
    """
    count, rest = divmod(total, block)

    def raw_block(size: int) -> bytes:  # raw deflate (no zlib header), byte-aligned by the full flush
        compressor = zlib.compressobj(9, zlib.DEFLATED, -15)
        return compressor.compress(bytes(size)) + compressor.flush(zlib.Z_FULL_FLUSH)

    parts = [b"\x78\xda"] + [raw_block(block)] * count + ([raw_block(rest)] if rest else [])
    checksum = ((total % ADLER_MODULUS) << 16) | 1
    return b"".join(parts) + b"\x03\x00" + struct.pack(">I", checksum)


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def png16_bomb(path: Path, width: int, height: int, inflated: int, colour_type: int = 2) -> Path:
    """A 16-bit PNG (RGB by default) declaring ``width`` x ``height`` whose image data inflates to ``inflated``
    zero bytes (whatever the header says)."""
    header = struct.pack(">IIBBBBB", width, height, 16, colour_type, 0, 0, 0)
    stream = zero_stream(inflated)
    chunks = [_png_chunk(b"IHDR", header)]
    for start in range(0, len(stream), 1 << 20):  # IDAT chunks of 1 MiB, as encoders usually split them
        chunks.append(_png_chunk(b"IDAT", stream[start : start + (1 << 20)]))
    path.write_bytes(PNG_SIGNATURE + b"".join(chunks) + _png_chunk(b"IEND", b""))
    return path


def _ifd_entry(tag: int, kind: int, count: int, value: int) -> bytes:
    if kind == 3 and count == 1:  # one SHORT sits in the first two bytes of the value field
        return struct.pack("<HHIHH", tag, kind, count, value, 0)
    return struct.pack("<HHII", tag, kind, count, value)


def _tiff(path: Path, height: int, width: int, segment: bytes, segments: int, layout: list[tuple[int, int]]) -> Path:
    """Classic little-endian TIFF, one uint16 plane, deflate (8); every segment points at the same bytes."""
    data_offset = 8
    offsets_at = data_offset + len(segment)
    counts_at = offsets_at + 4 * segments
    ifd_at = counts_at + 4 * segments
    offsets_tag, counts_tag = (324, 325) if layout[0][0] == 322 else (273, 279)
    entries = {
        256: (4, 1, width), 257: (4, 1, height), 258: (3, 1, 16), 259: (3, 1, 8), 262: (3, 1, 1),
        277: (3, 1, 1), 284: (3, 1, 1), 339: (3, 1, 1),
        offsets_tag: (4, segments, offsets_at if segments > 1 else data_offset),
        counts_tag: (4, segments, counts_at if segments > 1 else len(segment)),
    }
    for tag, value in layout:
        entries[tag] = (4, 1, value)
    ifd = struct.pack("<H", len(entries)) + b"".join(
        _ifd_entry(tag, *entries[tag]) for tag in sorted(entries)) + struct.pack("<I", 0)
    body = (struct.pack("<2sHI", b"II", 42, ifd_at) + segment
            + struct.pack(f"<{segments}I", *([data_offset] * segments))
            + struct.pack(f"<{segments}I", *([len(segment)] * segments)) + ifd)
    path.write_bytes(body)
    return path


def tiled_tiff_bomb(path: Path, height: int = 60000, width: int = 60000, tile: int = 512, seed: int = 0) -> Path:
    """A deflate-compressed tiled uint16 TIFF of ``height`` x ``width`` whose tiles all point at one tile of
    noise around 1000 (a readable image, piecewise)."""
    rng = np.random.default_rng(seed)
    pixels = rng.normal(1000, 20, (tile, tile)).clip(0, 65535).astype("<u2")
    segment = zlib.compress(pixels.tobytes(), 6)
    across, down = -(-width // tile), -(-height // tile)
    return _tiff(path, height, width, segment, across * down, [(322, tile), (323, tile)])


def strip_tiff_bomb(path: Path, height: int = 60000, width: int = 60000, inflated: int = 1 << 30) -> Path:
    """A deflate-compressed uint16 TIFF of ``height`` x ``width`` in one strip (so it cannot be read
    piecewise) whose strip inflates to ``inflated`` zero bytes."""
    return _tiff(path, height, width, zero_stream(inflated), 1, [(278, height)])


def sparse_npy_bomb(path: Path, shape: tuple[int, ...] = (60000, 60000), dtype: str = "<u2") -> Path:
    """A ``.npy`` file of ``shape`` whose data is a sparse hole: the full size on paper, nothing on disk."""
    with open(path, "wb") as handle:
        np.lib.format.write_array_header_2_0(handle, {"descr": dtype, "fortran_order": False, "shape": shape})
        handle.truncate(handle.tell() + int(np.prod(shape)) * np.dtype(dtype).itemsize)
    return path
