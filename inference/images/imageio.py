"""Read and write images as numpy arrays shaped ``(H, W, C)`` (stacks ``(N, H, W, C)``) in their native dtype.

Formats: PNG (8- and 16-bit, 1 to 4 channels; through Pillow, and a small codec of our own for the 16-bit colour
files Pillow would reduce to 8 bits), TIFF (8/16-bit integer and 32-bit
float, any channel count, multi-page files as stacks of frames, through tifffile) and ``.npy``.

Every problem with an input raises ``InputError(path, problem)``: missing file, unreadable or truncated file,
zero-size image, unsupported dtype (complex, 32/64-bit integers), NaN/Inf pixels (unless replaced), frames
of different shapes in one file, and a declared size over the limits of
:mod:`grainwright.inference.images.limits` (checked on the header, before any pixel is decoded).
:func:`read_centre_of_file` reads only the middle of a large tiled or striped TIFF or ``.npy`` file.
"""
from __future__ import annotations

import contextlib
import glob
import json
import struct
import warnings
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable

import numpy as np

from grainwright.inference.common.atomic import atomic_path, is_temporary, write_json_atomic
from grainwright.inference.common.errors import GrainwrightError, InputError
from grainwright.inference.images.crops import centre_box
from grainwright.inference.images.large_tiff import TiffRowReader, can_stream
from grainwright.inference.images.limits import check_declared_size, current_limits, within_limits

SUPPORTED_SUFFIXES = (".png", ".tif", ".tiff", ".npy")

# Integer dtypes whose every value survives the float32 working range exactly (24-bit mantissa).
EXACT_INTEGER_DTYPES = (np.dtype(np.uint8), np.dtype(np.uint16), np.dtype(np.int8), np.dtype(np.int16))
FLOAT_DTYPES = (np.dtype(np.float16), np.dtype(np.float32), np.dtype(np.float64))

# Sensor bit depths a 16-bit container commonly holds, smallest first.
COMMON_BIT_DEPTHS = (8, 10, 12, 14, 16)


def find_images(paths: str | Path | Iterable[str | Path], recursive: bool = False) -> list[Path]:
    """List image files from files, folders and glob patterns, in a stable order.

    Parameters
    ----------
    paths : path or iterable of paths
        Files are kept as given (a missing or unsupported file is kept too, so that reading it reports the
        problem by name); folders contribute their files with a supported suffix (PNG, TIFF, npy), except
        hidden ones (name starting with a dot) and grainwright's temporary files; glob
        patterns (``*``, ``?``, ``[``) contribute their matching supported files.
    recursive : bool
        Descend into sub-folders of the given folders (and let ``**`` in patterns match across folders).

    Returns
    -------
    list of Path
        Without duplicates, folders sorted by name.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    found: list[Path] = []
    for entry in paths:
        entry = Path(entry)
        if entry.is_dir():
            pattern = "**/*" if recursive else "*"
            found.extend(sorted(p for p in entry.glob(pattern) if p.is_file() and _supported(p)
                                and not _hidden(p.relative_to(entry))))
        elif entry.exists() or not any(ch in str(entry) for ch in "*?["):
            found.append(entry)
        else:
            matches = sorted(Path(p) for p in glob.glob(str(entry), recursive=recursive))
            if not matches:
                raise InputError(entry, "no file matches this pattern")
            found.extend(p for p in matches if p.is_file() and _supported(p))
    unique: dict[Path, None] = {}
    for path in found:
        unique.setdefault(path, None)
    return list(unique)


def _hidden(relative: Path) -> bool:
    # Hidden files and folders are skipped in folder scans as shell globs skip them: a temporary file of an
    # older version or another program (".frame03.a1b2.png") is not an image of the set.
    return any(part.startswith(".") for part in relative.parts)


def _supported(path: Path) -> bool:
    return path.suffix.lower() in SUPPORTED_SUFFIXES and not is_temporary(path)


def read_frames(path: str | Path, nonfinite: str = "error") -> np.ndarray:
    """Read every frame of an image file as an array shaped ``(N, H, W, C)`` in its native dtype.

    Parameters
    ----------
    path : str or Path
        A ``.png``, ``.tif``/``.tiff`` or ``.npy`` file. A ``.npy`` array may be ``(H, W)``, ``(H, W, C)`` with
        ``C <= 4``, ``(N, H, W)`` or ``(N, H, W, C)``.
    nonfinite : {"error", "replace"}
        What to do with NaN/Inf pixels of float data: refuse the file, or replace them by the median of the
        finite pixels of the file.

    Returns
    -------
    numpy.ndarray
        ``(N, H, W, C)``; boolean data comes back as uint8 (0/1).
    """
    path = _checked_path(path, nonfinite)
    suffix = path.suffix.lower()
    with _decoding(path):
        if suffix == ".npy":
            frames = _read_npy(path)
        elif suffix == ".png":
            frames = _read_png(path)
        else:
            frames = _read_tiff(path)
    return _check_frames(path, frames, nonfinite)


def _checked_path(path: str | Path, nonfinite: str) -> Path:
    path = Path(path)
    if nonfinite not in ("error", "replace"):
        raise ValueError(f"nonfinite must be 'error' or 'replace', not {nonfinite!r}")
    if not path.exists():
        raise InputError(path, "no such file")
    if path.is_dir():
        raise InputError(path, "is a folder, not an image file")
    if path.suffix.lower() not in SUPPORTED_SUFFIXES:
        raise InputError(path, f"unsupported file type '{path.suffix}' (supported: {', '.join(SUPPORTED_SUFFIXES)})")
    if path.stat().st_size == 0:
        raise InputError(path, "empty file (0 bytes)")
    return path


@contextlib.contextmanager
def _decoding(path: Path) -> Iterator[None]:
    """Turn a decoder's failure into one line naming the file."""
    try:
        yield
    except GrainwrightError:
        raise
    except Exception as error:  # decoders raise many types for truncated or corrupt files
        raise InputError(path, f"cannot read the file, it may be truncated or corrupt ({type(error).__name__}: {error})") from None


def read_image(path: str | Path, nonfinite: str = "error") -> np.ndarray:
    """Read a single-frame image as ``(H, W, C)``; a multi-frame file is refused (use ``read_frames``)."""
    frames = read_frames(path, nonfinite=nonfinite)
    if frames.shape[0] != 1:
        raise InputError(path, f"holds {frames.shape[0]} frames; expected a single image")
    return frames[0]


@dataclass(frozen=True)
class FileCentre:
    """The central square of a file's first frames, with the file's full size."""

    frames: np.ndarray  # (n, h, w, C), native dtype: the crop of each of the first n frames
    count: int  # frames in the file
    shape: tuple[int, int, int]  # (H, W, C) of every frame
    piecewise: bool  # read without decoding the whole file


def read_centre_of_file(path: str | Path, edge: int, frames: int = 1, nonfinite: str = "error") -> FileCentre:
    """Read the central ``edge`` x ``edge`` square (or all, if smaller) of the first ``frames`` frames of a file.

    A tiled or striped TIFF (see :func:`grainwright.inference.images.large_tiff.can_stream`) is read only in
    the strips or tiles holding the square, and a ``.npy`` file row by row, so neither meets the size limits
    however large the file. Other files are decoded whole, within the limits, and cropped. Checks (pixel
    type, NaN/Inf) apply to the crop.
    """
    path = _checked_path(path, nonfinite)
    suffix = path.suffix.lower()
    with _decoding(path):
        if suffix in (".tif", ".tiff") and can_stream(path):
            with TiffRowReader(path) as reader:
                rows, cols = centre_box(*reader.shape[:2], edge)
                crop = np.stack([reader.read_block(frame, rows.start, rows.stop, cols.start, cols.stop)
                                 for frame in range(min(frames, reader.frames))])
                count, shape, piecewise = reader.frames, reader.shape, True
        elif suffix == ".npy":
            count, *shape = _npy_header(path).frames_shape
            rows, cols = centre_box(*shape[:2], edge)
            crop, piecewise = _npy_crop(path, frames, rows, cols), True
        else:
            whole = read_frames(path, nonfinite=nonfinite)
            rows, cols = centre_box(*whole.shape[1:3], edge)
            crop = np.ascontiguousarray(whole[:frames, rows, cols])
            count, shape, piecewise = whole.shape[0], whole.shape[1:], False
    return FileCentre(_check_frames(path, crop, nonfinite), int(count), tuple(int(n) for n in shape), piecewise)


@dataclass(frozen=True)
class _NpyHeader:
    frames_shape: tuple[int, int, int, int]  # (N, H, W, C) the array is read as
    dtype: np.dtype
    fortran_order: bool
    data_offset: int  # bytes before the data


def _npy_header(path: Path) -> _NpyHeader:
    """Read and check a ``.npy`` header (NumPy format versions 1.0 and 2.0) without touching the data."""
    with open(path, "rb") as handle:
        version = np.lib.format.read_magic(handle)
        if version == (1, 0):
            shape, fortran_order, dtype = np.lib.format.read_array_header_1_0(handle)
        elif version == (2, 0):
            shape, fortran_order, dtype = np.lib.format.read_array_header_2_0(handle)
        else:
            raise InputError(path, f".npy format version {version[0]}.{version[1]} is not supported (1.0 or 2.0)")
        data_offset = handle.tell()
    if dtype.hasobject:
        raise InputError(path, "holds Python objects, not pixel data (refused: loading them could run code)")
    if len(shape) == 2:
        frames_shape = (1, *shape, 1)
    elif len(shape) == 3:
        frames_shape = (1, *shape) if shape[-1] <= 4 else (*shape, 1)
    elif len(shape) == 4:
        frames_shape = tuple(shape)
    else:
        raise InputError(path, f"array of shape {tuple(shape)} is not an image (expected 2 to 4 dimensions)")
    size = int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
    if path.stat().st_size < data_offset + size:
        raise InputError(path, f"truncated .npy file (the header declares {size} bytes of data, the file holds "
                               f"{max(0, path.stat().st_size - data_offset)})")
    return _NpyHeader(frames_shape, dtype, bool(fortran_order), data_offset)


def _read_npy(path: Path) -> np.ndarray:
    header = _npy_header(path)
    count, height, width, channels = header.frames_shape
    check_declared_size(path, height, width, channels, header.dtype, count)
    return np.load(path, allow_pickle=False).reshape(header.frames_shape)


def _npy_crop(path: Path, frames: int, rows: slice, cols: slice) -> np.ndarray:
    """Rows and columns of the first frames of a ``.npy`` file, read row by row (C order) without mapping it."""
    header = _npy_header(path)
    count, height, width, channels = header.frames_shape
    if header.fortran_order:  # rare for images: let NumPy map it and copy the crop
        mapped = np.load(path, mmap_mode="r", allow_pickle=False).reshape(header.frames_shape, order="F")
        return np.array(mapped[:frames, rows, cols])
    pixel = channels * header.dtype.itemsize
    out = np.empty((min(frames, count), rows.stop - rows.start, cols.stop - cols.start, channels), header.dtype)
    with open(path, "rb") as handle:
        for frame in range(out.shape[0]):
            for index, y in enumerate(range(rows.start, rows.stop)):
                handle.seek(header.data_offset + ((frame * height + y) * width + cols.start) * pixel)
                out[frame, index] = np.frombuffer(handle.read(out.shape[2] * pixel), header.dtype).reshape(
                    out.shape[2], channels)
    return out


def _read_png(path: Path) -> np.ndarray:
    from PIL import Image

    with open(path, "rb") as handle:
        header = handle.read(33)
    if header[:8] != PNG_SIGNATURE:
        raise InputError(path, "not a PNG file (bad signature)")
    if len(header) < 33 or header[12:16] != b"IHDR":
        raise InputError(path, "truncated or corrupt PNG (no IHDR header first)")
    width, height = struct.unpack(">II", header[16:24])
    bit_depth, colour_type = header[24], header[25]
    channels = PNG_DECODED_CHANNELS.get(colour_type, 4)
    check_declared_size(path, height, width, channels, np.uint16 if bit_depth == 16 else np.uint8)
    if bit_depth == 16 and colour_type in (2, 4, 6):  # Pillow would reduce these to 8 bits
        return _png16_decode(path)[0][None]
    _raise_pillow_limit()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)  # our own limit was checked above
        image = Image.open(path)
    with image:
        image.load()
        if image.mode == "P":
            image = image.convert("RGBA" if "transparency" in image.info else "RGB")
        elif image.mode == "1":
            image = image.convert("L")
        array = np.asarray(image)
        if image.mode in ("I", "I;16", "I;16B", "I;16L"):
            array = array.astype(np.uint16) if bit_depth == 16 else array
    if array.ndim == 2:
        array = array[:, :, None]
    return array[None]


def _raise_pillow_limit() -> None:
    """Let Pillow decode what our own limit (already checked) allows: Pillow warns over its threshold and
    refuses at twice it, so a raised ``GRAINWRIGHT_MAX_PIXELS`` raises Pillow's too (never lowers it)."""
    from PIL import Image

    limit = current_limits().max_pixels
    if Image.MAX_IMAGE_PIXELS is not None and limit > Image.MAX_IMAGE_PIXELS:
        Image.MAX_IMAGE_PIXELS = limit


def _series_size(path: Path, shape: tuple[int, ...], axes: str) -> tuple[int, int, int, int]:
    """``(frames, height, width, channels)`` of a tifffile series from its declared shape and axes."""
    if "Y" not in axes or "X" not in axes:
        raise InputError(path, f"TIFF series with axes '{axes}' has no image plane")
    sizes = dict(zip(axes, shape))
    frames = int(np.prod([size for axis, size in zip(axes, shape) if axis not in "YXSC"], dtype=np.int64))
    channels = int(np.prod([size for axis, size in zip(axes, shape) if axis in "SC"], dtype=np.int64))
    return frames, int(sizes["Y"]), int(sizes["X"]), channels


def _read_tiff(path: Path) -> np.ndarray:
    import tifffile

    with tifffile.TiffFile(path) as tiff:
        declared = [(_series_size(path, series.shape, series.axes), series.dtype) for series in tiff.series]
        if declared:
            frames = sum(size[0] for size, _ in declared)
            (_, height, width, channels), dtype = declared[0]
            if not within_limits(height, width, channels, dtype, frames):
                check_declared_size(path, height, width, channels, dtype, frames, streamable=can_stream(path))
        stacks = [_series_to_frames(path, series.asarray(), series.axes) for series in tiff.series]
    if not stacks:
        raise InputError(path, "TIFF file holds no image")
    shapes = {stack.shape[1:] for stack in stacks}
    if len(shapes) > 1:
        raise InputError(path, f"frames have different shapes {sorted(shapes)}; expected one shape per file")
    return stacks[0] if len(stacks) == 1 else np.concatenate(stacks, axis=0)


def _series_to_frames(path: Path, array: np.ndarray, axes: str) -> np.ndarray:
    """Reorder a tifffile series (axes such as ``YX``, ``YXS``, ``CYX``, ``IYXS``) to ``(N, H, W, C)``."""
    if "Y" not in axes or "X" not in axes:
        raise InputError(path, f"TIFF series with axes '{axes}' has no image plane")
    channel_axes = [i for i, a in enumerate(axes) if a in "SC"]
    if len(channel_axes) > 1:
        raise InputError(path, f"TIFF series with axes '{axes}' has more than one channel axis")
    frame_axes = [i for i, a in enumerate(axes) if a not in "YXSC"]
    order = frame_axes + [axes.index("Y"), axes.index("X")] + channel_axes
    array = np.transpose(array, order)
    frames = int(np.prod(array.shape[: len(frame_axes)])) if frame_axes else 1
    channels = array.shape[-1] if channel_axes else 1
    return array.reshape(frames, array.shape[len(frame_axes)], array.shape[len(frame_axes) + 1], channels)


def _check_frames(path: Path, frames: np.ndarray, nonfinite: str) -> np.ndarray:
    dtype = frames.dtype
    if dtype == np.bool_:
        frames = frames.astype(np.uint8)
        dtype = frames.dtype
    if dtype.kind == "c":
        raise InputError(path, f"complex data ({dtype}) is not supported; save magnitude or real part")
    if dtype.kind in "iu" and dtype not in EXACT_INTEGER_DTYPES:
        raise InputError(
            path,
            f"{dtype} data is not supported (float32 processing cannot keep every {dtype.itemsize * 8}-bit value "
            "exact); convert to uint16 or float32",
        )
    if dtype.kind not in "iuf" or (dtype.kind == "f" and dtype not in FLOAT_DTYPES):
        raise InputError(path, f"unsupported pixel type {dtype}")
    if 0 in frames.shape:
        raise InputError(path, f"zero-size image (shape {frames.shape[1:]})")
    if dtype.kind == "f":
        finite = np.isfinite(frames)
        bad = int(frames.size - np.count_nonzero(finite))
        if bad:
            if nonfinite == "error":
                raise InputError(path, f"{bad} NaN/Inf pixel values (use the option to replace them by the median)")
            if bad == frames.size:
                raise InputError(path, "every pixel is NaN/Inf")
            frames = frames.copy()
            frames[~finite] = np.median(frames[finite])
    return np.ascontiguousarray(frames)


def effective_bit_depth(array: np.ndarray) -> int | None:
    """Bit depth the integer data actually uses, e.g. 12 for 12-bit sensor data in a 16-bit container.

    Unsigned data: the smallest common sensor depth (8, 10, 12, 14, 16, capped at the container's size) whose
    maximum ``2**bits - 1`` is at least the data's maximum. A dark frame of 12-bit data may therefore look like
    8 or 10 bits: let the user state the depth when known. Signed data: the container's size. Float data: None.
    """
    array = np.asarray(array)
    if array.dtype.kind == "f":
        return None
    if array.dtype == np.bool_:
        return 1
    container = array.dtype.itemsize * 8
    if array.dtype.kind == "i":
        return container
    top = int(array.max()) if array.size else 0
    for bits in COMMON_BIT_DEPTHS:
        if bits <= container and top <= 2**bits - 1:
            return bits
    return container


def write_image(
    path: str | Path,
    array: np.ndarray,
    *,
    dtype: np.dtype | str | None = None,
    text: str | None = None,
    overwrite: bool = False,
    durable: bool = False,
) -> Path:
    """Write an image or stack atomically (temporary file in the same folder, then ``os.replace``).

    Parameters
    ----------
    path : str or Path
        ``.png`` (uint8 or uint16, 1 to 4 channels), ``.tif``/``.tiff`` (any supported dtype and channel count; a stack
        becomes a multi-page file) or ``.npy``.
    array : numpy.ndarray
        ``(H, W)``, ``(H, W, C)`` or, for TIFF and npy, ``(N, H, W, C)``.
    dtype : dtype, optional
        Dtype written; default the array's. Values are clipped to the dtype's range and rounded to the nearest
        integer for integer dtypes, never wrapped.
    text : str, optional
        Stored in the TIFF ImageDescription, a PNG ``Description`` text chunk, or a JSON sidecar
        ``NAME.npy.json`` (``{"text": ...}``) for npy.
    overwrite : bool
        Replace an existing file; without it an existing file raises ``InputError``.
    durable : bool
        ``fsync`` the file and its folder before returning, so the output survives a power cut.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in SUPPORTED_SUFFIXES:
        raise InputError(path, f"cannot write '{path.suffix}' files (supported: {', '.join(SUPPORTED_SUFFIXES)})")
    if path.exists() and not overwrite:
        raise InputError(path, "already exists (not overwritten without the overwrite option)")
    data = _to_dtype(np.asarray(array), np.dtype(dtype) if dtype is not None else None)
    if data.ndim == 2:
        data = data[:, :, None]
    if data.ndim == 4 and data.shape[0] == 1 and suffix == ".png":
        data = data[0]
    if data.ndim not in (3, 4) or 0 in data.shape:
        raise InputError(path, f"cannot write an array of shape {np.shape(array)} as an image")
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(path, durable=durable) as temporary:
        if suffix == ".png":
            _write_png(path, temporary, data, text)
        elif suffix == ".npy":
            with open(temporary, "wb") as out:
                np.save(out, data, allow_pickle=False)
        else:
            _write_tiff(temporary, data, text)
        if suffix == ".npy" and text is not None:
            write_json_atomic(Path(str(path) + ".json"), {"text": text}, indent=1)
    return path


def _to_dtype(array: np.ndarray, dtype: np.dtype | None) -> np.ndarray:
    if dtype is None:
        dtype = array.dtype
    if dtype.kind in "iu":
        if array.dtype == dtype:
            return array
        info = np.iinfo(dtype)
        values = array.astype(np.float64) if array.dtype.kind == "f" else array
        if values.dtype.kind == "f":
            values = np.rint(np.nan_to_num(values, nan=0.0, posinf=info.max, neginf=info.min))
        return np.clip(values, info.min, info.max).astype(dtype)
    if dtype.kind == "f":
        return array.astype(dtype, copy=False)
    raise InputError(None, f"cannot write pixel type {dtype}")


def _write_png(path: Path, temporary: str, data: np.ndarray, text: str | None) -> None:
    from PIL import Image
    from PIL.PngImagePlugin import PngInfo

    if data.ndim != 3:
        raise InputError(path, "PNG holds a single frame; write a stack as TIFF")
    channels = data.shape[2]
    if data.dtype == np.uint16 and 2 <= channels <= 4:  # Pillow cannot write 16-bit colour
        Path(temporary).write_bytes(_png16_encode(data, text))
        return
    if data.dtype == np.uint16 and channels == 1:
        image = Image.fromarray(data[:, :, 0])
    elif data.dtype == np.uint8 and channels in (1, 2, 3, 4):
        image = Image.fromarray(data[:, :, 0] if channels == 1 else data, mode=None)
    else:
        raise InputError(
            path, f"PNG cannot hold {data.dtype} data with {channels} channel(s) here; write it as TIFF (.tif)"
        )
    info = PngInfo()
    if text is not None:
        info.add_itxt("Description", text)
    image.save(temporary, format="PNG", pnginfo=info)


def _write_tiff(temporary: str, data: np.ndarray, text: str | None) -> None:
    import tifffile

    frames = data if data.ndim == 4 else data[None]
    with tifffile.TiffWriter(temporary) as tiff:
        for index, frame in enumerate(frames):
            channels = frame.shape[2]
            photometric = "rgb" if channels in (3, 4) and frame.dtype == np.uint8 else "minisblack"
            tiff.write(
                frame[:, :, 0] if channels == 1 else frame,
                photometric=photometric,
                planarconfig="contig" if channels > 1 else None,
                description=text if index == 0 else None,
                metadata=None,
                contiguous=False,
            )


def read_text(path: str | Path) -> str | None:
    """The text stored by ``write_image`` (TIFF ImageDescription, PNG text chunk, npy sidecar) or by
    ``stacks.write_stack`` (ImageJ ``Info`` property, OME ``Image/Description``), or None."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix == ".npy":
        sidecar = Path(str(path) + ".json")
        return json.loads(sidecar.read_text(encoding="utf-8")).get("text") if sidecar.exists() else None
    if suffix == ".png":
        from PIL import Image

        with Image.open(path) as image:
            return image.info.get("Description")
    import tifffile

    with tifffile.TiffFile(path) as tiff:
        if tiff.is_imagej:
            return (tiff.imagej_metadata or {}).get("Info") or None
        if tiff.is_ome:
            import xml.etree.ElementTree as ElementTree

            found = ElementTree.fromstring(tiff.ome_metadata).find(".//{*}Image/{*}Description")
            return found.text if found is not None and found.text else None
        return tiff.pages[0].description or None


# ---------------------------------------------------------------------------------------- 16-bit colour PNG
# Pillow reduces 16-bit grayscale+alpha, RGB and RGBA PNGs to 8 bits, so these are written and read here, after
# the PNG specification (W3C, 2nd edition): chunks IHDR, IDAT (a zlib stream of scanlines, each led by a filter
# type 0-4), IEND and an optional iTXt; samples big-endian; non-interlaced files only. The reader undoes the five
# scanline filters for all rows at once, one anti-diagonal of pixels at a time (a pixel depends on its left,
# upper and upper-left neighbours).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
PNG_COLOUR_TYPES = {1: 0, 2: 4, 3: 2, 4: 6}  # channels -> PNG colour type
PNG_CHANNELS = {value: key for key, value in PNG_COLOUR_TYPES.items()}
# Channels a PNG colour type decodes to here (palette files become RGB or RGBA; counted as RGB).
PNG_DECODED_CHANNELS = {0: 1, 2: 3, 3: 3, 4: 2, 6: 4}


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def _png16_encode(image: np.ndarray, text: str | None = None) -> bytes:
    """PNG bytes for a uint16 image ``(H, W, C)`` with C in 1..4 (no scanline filtering, zlib level 6)."""
    height, width, channels = image.shape
    header = struct.pack(">IIBBBBB", width, height, 16, PNG_COLOUR_TYPES[channels], 0, 0, 0)
    rows = image.astype(">u2").reshape(height, width * channels).view(np.uint8)
    scanlines = np.concatenate([np.zeros((height, 1), np.uint8), rows], axis=1)
    parts = [PNG_SIGNATURE, _png_chunk(b"IHDR", header)]
    if text is not None:
        parts.append(_png_chunk(b"iTXt", b"Description\x00\x00\x00\x00\x00" + text.encode("utf-8")))
    parts += [_png_chunk(b"IDAT", zlib.compress(scanlines.tobytes(), 6)), _png_chunk(b"IEND", b"")]
    return b"".join(parts)


def _png_chunks(path: Path, blob: bytes):
    position = len(PNG_SIGNATURE)
    while position + 8 <= len(blob):
        (length,) = struct.unpack(">I", blob[position : position + 4])
        kind = blob[position + 4 : position + 8]
        data = blob[position + 8 : position + 8 + length]
        if len(data) != length or position + 12 + length > len(blob):
            raise InputError(path, "truncated PNG (a chunk runs past the end of the file)")
        yield kind, data
        position += 12 + length
        if kind == b"IEND":
            return
    raise InputError(path, "truncated PNG (no IEND chunk)")


def _png16_decode(path: Path) -> tuple[np.ndarray, str | None]:
    """Read a non-interlaced 16-bit PNG as uint16 ``(H, W, C)``, with its ``Description`` text if any."""
    blob = Path(path).read_bytes()
    if not blob.startswith(PNG_SIGNATURE):
        raise InputError(path, "not a PNG file (bad signature)")
    header, compressed, text = None, [], None
    for kind, data in _png_chunks(path, blob):
        if kind == b"IHDR":
            header = struct.unpack(">IIBBBBB", data)
        elif kind == b"IDAT":
            compressed.append(data)
        elif kind == b"iTXt" and data.startswith(b"Description\x00"):
            fields = data[len(b"Description\x00") :]
            if fields[0] == 0:  # uncompressed text
                rest = fields[2:]
                rest = rest[rest.index(b"\x00") + 1 :]  # language tag
                text = rest[rest.index(b"\x00") + 1 :].decode("utf-8")  # translated keyword
    if header is None:
        raise InputError(path, "PNG without an IHDR header")
    width, height, depth, colour, _, _, interlace = header
    if depth != 16 or colour not in PNG_CHANNELS:
        raise InputError(path, f"not a 16-bit grayscale/colour PNG (bit depth {depth}, colour type {colour})")
    if interlace:
        raise InputError(path, "interlaced 16-bit PNG is not supported; save it without interlacing or as TIFF")
    channels = PNG_CHANNELS[colour]
    stride = width * channels * 2
    check_declared_size(path, height, width, channels, np.uint16)
    expected = height * (stride + 1)
    # Inflate no more than the header declares: a stream longer than that is refused, not held in memory.
    raw = zlib.decompressobj().decompress(b"".join(compressed), expected + 1)
    if len(raw) > expected:
        raise InputError(path, "corrupt PNG (image data longer than the header says)")
    if len(raw) != expected:
        raise InputError(path, "truncated PNG (image data shorter than the header says)")
    lines = np.frombuffer(raw, np.uint8).reshape(height, stride + 1)
    pixels = _png_unfilter(path, lines[:, 0], lines[:, 1:], width, channels * 2)
    image = pixels.reshape(height, width * channels * 2).view(">u2").astype(np.uint16)
    return image.reshape(height, width, channels), text


def _png_unfilter(path: Path, kinds: np.ndarray, data: np.ndarray, width: int, bpp: int) -> np.ndarray:
    if np.any(kinds > 4):
        raise InputError(path, "corrupt PNG (unknown scanline filter)")
    if not np.any(kinds):
        return data.copy()
    height = data.shape[0]
    raw = data.reshape(height, width, bpp).astype(np.int32)
    out = np.zeros((height + 1, width + 1, bpp), np.int32)  # one row and column of zeros in front
    for diagonal in range(height + width - 1):
        ys = np.arange(max(0, diagonal - width + 1), min(height - 1, diagonal) + 1)
        xs = diagonal - ys
        left, up, corner = out[ys + 1, xs], out[ys, xs + 1], out[ys, xs]
        estimate = left + up - corner
        to_left, to_up, to_corner = np.abs(estimate - left), np.abs(estimate - up), np.abs(estimate - corner)
        paeth = np.where((to_left <= to_up) & (to_left <= to_corner), left, np.where(to_up <= to_corner, up, corner))
        kind = kinds[ys][:, None]
        predictor = np.select(
            [kind == 1, kind == 2, kind == 3, kind == 4], [left, up, (left + up) >> 1, paeth], default=0
        )
        out[ys + 1, xs + 1] = (raw[ys, xs] + predictor) & 0xFF
    return out[1:, 1:].astype(np.uint8).reshape(height, width * bpp)
