"""Large TIFF files in bounded memory: read rows strip by strip or tile by tile, write tiled TIFFs incrementally.

Peak resident memory is what a plant machine's memory limit sees, and mapped file pages count towards it, so the
reader never memory-maps the file: it seeks to each strip or tile (the TIFF 6.0 StripOffsets/TileOffsets tags),
decodes it with tifffile's codec for that page and keeps only the rows asked for. The writer hands tifffile an
iterator of tiles, which tifffile encodes and writes one at a time.

Pages that cannot be read piecewise (compressed with the whole image in one strip, or strips or tiles larger than
the frame limit of :mod:`grainwright.inference.images.limits`) are reported by :func:`can_stream` so the caller
decodes them whole instead, which the size limits then govern.
"""
from __future__ import annotations

from collections.abc import Iterable, Iterator
from pathlib import Path

import numpy as np
import tifffile

from grainwright.inference.common.atomic import atomic_path
from grainwright.inference.common.errors import InputError
from grainwright.inference.images.limits import current_limits

# Frames at least this large (pixels) are streamed when they can be; smaller ones are decoded whole, which is
# faster and bounded anyway (a 16-bit 4-megapixel frame is 8 MB).
STREAM_FROM_PIXELS = 4_000_000
COMPRESSION_NONE = 1
# Compression schemes tifffile can also encode without extra packages, so an output can mirror its input.
WRITABLE_COMPRESSION = {8: "zlib", 32946: "zlib"}


def _frame_pages(tiff: tifffile.TiffFile) -> list[tifffile.TiffPage]:
    return [page for page in tiff.pages if isinstance(page, tifffile.TiffPage)]


def _page_streamable(page: tifffile.TiffPage) -> bool:
    if page.dtype is None or page.bitspersample != page.dtype.itemsize * 8 or page.imagedepth != 1:
        return False
    if page.is_tiled or len(page.dataoffsets) > (1 if page.planarconfig == 1 else page.samplesperpixel):
        # each strip or tile is decoded whole: one larger than the frame limit would defeat the purpose
        rows, columns = (page.tilelength, page.tilewidth) if page.is_tiled else (page.rowsperstrip, page.imagewidth)
        return min(rows, page.imagelength) * columns <= current_limits().max_pixels
    return page.compression == COMPRESSION_NONE and page.planarconfig == 1 and page.predictor == 1


def can_stream(path: str | Path) -> bool:
    """True when every page of the TIFF can be read a few rows at a time (tiled, several strips, or
    uncompressed), all pages share one shape and dtype, and the frames are large enough to be worth it."""
    try:
        with tifffile.TiffFile(path) as tiff:
            pages = _frame_pages(tiff)
            if not pages or len({(p.shape, p.dtype) for p in pages}) != 1:
                return False
            first = pages[0]
            return first.imagelength * first.imagewidth >= STREAM_FROM_PIXELS and all(map(_page_streamable, pages))
    except Exception:  # anything tifffile cannot parse is left to the whole-file reader, which names the problem
        return False


class TiffRowReader:
    """Read rows of the frames (pages) of a TIFF without holding or mapping the whole file.

    Use as a context manager. ``shape`` is ``(H, W, C)`` of every frame; ``read_rows(frame, y0, y1)`` returns
    rows ``y0:y1`` as ``(y1 - y0, W, C)`` in the native dtype.
    """

    def __init__(self, path: str | Path):
        self.path = Path(path)
        try:
            self._tiff = tifffile.TiffFile(self.path)
        except Exception as error:
            raise InputError(self.path, f"cannot read the TIFF ({type(error).__name__}: {error})") from None
        self.pages = _frame_pages(self._tiff)
        if not self.pages or not all(map(_page_streamable, self.pages)):
            self.close()
            raise InputError(self.path, "this TIFF cannot be read piecewise; it must be decoded whole")
        first = self.pages[0]
        self.shape = (first.imagelength, first.imagewidth, first.samplesperpixel)
        self.dtype = np.dtype(first.dtype)
        self.compression = first.compression

    def __enter__(self) -> "TiffRowReader":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self._tiff.close()

    @property
    def frames(self) -> int:
        return len(self.pages)

    def _raw(self, offset: int, count: int) -> bytes:
        handle = self._tiff.filehandle
        handle.seek(offset)
        data = handle.read(count)
        if len(data) != count:
            raise InputError(self.path, "file is truncated (a strip or tile ends past the end of the file)")
        return data

    def read_rows(self, frame: int, y0: int, y1: int) -> np.ndarray:
        """Rows ``y0:y1`` of frame ``frame`` as ``(y1 - y0, W, C)``, native dtype."""
        return self.read_block(frame, y0, y1, 0, self.shape[1])

    def read_block(self, frame: int, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        """Rows ``y0:y1``, columns ``x0:x1`` of frame ``frame`` as ``(y1 - y0, x1 - x0, C)``, native dtype; decodes
        only the strips or tiles that hold them."""
        page = self.pages[frame]
        height, width, samples = self.shape
        if not (0 <= y0 < y1 <= height and 0 <= x0 < x1 <= width):
            raise ValueError(f"block {y0}:{y1}, {x0}:{x1} outside {height} x {width}")
        if not page.is_tiled and len(page.dataoffsets) == 1:  # one uncompressed strip: rows are contiguous
            row_bytes = width * samples * self.dtype.itemsize
            data = self._raw(page.dataoffsets[0] + y0 * row_bytes, (y1 - y0) * row_bytes)
            rows = np.frombuffer(data, self.dtype.newbyteorder(self._tiff.byteorder))
            return rows.reshape(y1 - y0, width, samples)[:, x0:x1].astype(self.dtype)
        return self._read_segments(page, y0, y1, x0, x1)

    def _read_segments(self, page: tifffile.TiffPage, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        height, width, samples = self.shape
        out = np.zeros((y1 - y0, x1 - x0, samples), self.dtype)
        if page.is_tiled:
            seg_height, seg_width = page.tilelength, page.tilewidth
        else:
            seg_height, seg_width = min(page.rowsperstrip, height), width
        across = -(-width // seg_width)
        per_plane = -(-height // seg_height) * across
        planes = samples if page.planarconfig == 2 else 1
        for plane in range(planes):
            for seg_row in range(y0 // seg_height, (y1 - 1) // seg_height + 1):
                for seg_col in range(x0 // seg_width, (x1 - 1) // seg_width + 1):
                    index = plane * per_plane + seg_row * across + seg_col
                    count = page.databytecounts[index]
                    if count == 0:
                        continue  # an empty segment holds zeros
                    data = self._raw(page.dataoffsets[index], count)
                    segment, _, _ = page.decode(data, index, jpegtables=page.jpegtables)
                    top, left = seg_row * seg_height, seg_col * seg_width
                    segment = segment[0]  # (rows, cols, samples) of this segment, possibly padded at the edges
                    src_top, src_bottom = max(y0, top) - top, min(y1, top + seg_height, height) - top
                    src_left, src_right = max(x0, left) - left, min(x1, left + seg_width, width) - left
                    channel = slice(plane, plane + 1) if planes > 1 else slice(None)
                    out[top + src_top - y0 : top + src_bottom - y0, left + src_left - x0 : left + src_right - x0,
                        channel] = segment[src_top:src_bottom, src_left:src_right]
        return out


def tiff_layout(channels: int, dtype: np.dtype) -> dict[str, str | None]:
    """Photometric and planar configuration, chosen the way :func:`grainwright.inference.images.imageio.write_image`
    chooses them so both writers' files read back the same."""
    photometric = "rgb" if channels in (3, 4) and np.dtype(dtype) == np.uint8 else "minisblack"
    return {"photometric": photometric, "planarconfig": "contig" if channels > 1 else None}


def write_tiled_tiff(
    path: str | Path,
    frames: Iterable[Iterator[np.ndarray]],
    *,
    shape: tuple[int, int, int],
    dtype: np.dtype,
    tile: tuple[int, int],
    description: str | None = None,
    compression: str | None = None,
    count: int = 1,
    overwrite: bool = False,
    durable: bool = False,
) -> Path:
    """Write frames tile by tile to a tiled TIFF, atomically (temporary name in the same folder, then rename).

    Parameters
    ----------
    frames : iterable of iterators
        One iterator per frame, yielding ``(tile height, tile width, C)`` arrays (edge tiles may be smaller) in
        row-major tile order.
    shape : (H, W, C)
        Frame shape in pixels and channels.
    tile : (int, int)
        Tile height and width in pixels, multiples of 16 (TIFF 6.0, section 15).
    description : str, optional
        Written to the first page's ImageDescription.
    count : int
        Number of frames, to choose BigTIFF when the file would pass the classic TIFF's 4 GB offsets.
    durable : bool
        ``fsync`` the file and its folder before returning.
    """
    path = Path(path)
    if path.exists() and not overwrite:
        raise InputError(path, "already exists (not overwritten without --overwrite)")
    height, width, channels = shape
    layout = tiff_layout(channels, dtype)
    with atomic_path(path, durable=durable) as temporary:
        size = count * height * width * channels * np.dtype(dtype).itemsize
        with tifffile.TiffWriter(temporary, bigtiff=size > 2**31) as tiff:
            for index, tiles in enumerate(frames):
                tiff.write(
                    _full_tiles(tiles, tile, channels, dtype),
                    shape=(height, width, channels) if channels > 1 else (height, width),
                    dtype=dtype,
                    tile=tuple(tile),
                    compression=compression,
                    description=description if index == 0 else None,
                    metadata=None,
                    maxworkers=1,  # one tile at a time: parallel compression would buffer hundreds of MB
                    **layout,
                )
    return path


def _full_tiles(tiles: Iterator[np.ndarray], tile: tuple[int, int], channels: int,
                dtype: np.dtype) -> Iterator[np.ndarray]:
    for block in tiles:
        if block.shape[:2] != tuple(tile):
            padded = np.zeros((*tile, channels), dtype)
            padded[: block.shape[0], : block.shape[1]] = block
            block = padded
        yield np.ascontiguousarray(block if channels > 1 else block[:, :, 0], dtype=dtype)
