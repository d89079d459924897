"""Stacks of frames (sequences, bursts) and volumes of slices (z-stacks): read one frame at a time, write frame by
frame, and keep the axis and voxel-size metadata.

A stack is ``N`` frames of ``(H, W, C)`` pixels along one axis: ``Z`` (slices of a volume), ``T`` (time points of
a sequence) or ``I`` (frames the file does not name). Three sources:

- a TIFF file: plain multi-page, ImageJ hyperstack (axes, ``spacing``, ``unit``, ``finterval`` and the X/Y
  resolution tags) or OME-TIFF (``PhysicalSizeX/Y/Z`` with their units, ``TimeIncrement``), read through
  tifffile one page at a time (no memory map: mapped pages would count towards the resident memory);
- a ``.npy`` array ``(N, H, W)`` or ``(N, H, W, C)``, read one frame at a time by seeking past its header;
- a folder of numbered single-frame files (``part_0007.png`` ...): the frame order is the file-name order, and
  the numbers must run on without a gap.

:func:`write_stack` writes frames as they come (an iterator), in the source's flavour, so that a volume read,
denoised and written keeps its axes, voxel size, dtype and shape; peak memory is one frame plus the writer's
buffers. Bad input raises ``InputError`` naming the file: frames of different shapes, an unsupported dtype, two
stack axes in one file (T and Z), a gap in a folder's numbering.
"""
from __future__ import annotations

import re
import xml.etree.ElementTree as ElementTree
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import tifffile

from grainwright.inference.common.atomic import atomic_path, write_json_atomic
from grainwright.inference.common.errors import InputError
from grainwright.inference.images.limits import check_declared_size
from grainwright.inference.images.imageio import (
    EXACT_INTEGER_DTYPES,
    FLOAT_DTYPES,
    find_images,
    read_frames,
)

# tifffile's letters for axes that are neither spatial (Y, X) nor channels (S samples, C planes).
STACK_AXES = ("Z", "T", "I", "Q")
IMAGEJ_DTYPES = (np.dtype(np.uint8), np.dtype(np.uint16), np.dtype(np.float32))
FLAVOURS = ("imagej", "ome", "tiff", "npy", "folder")
FRAME_NUMBER = re.compile(r"(\d+)(?!.*\d)")


@dataclass(frozen=True)
class StackInfo:
    """Shape, dtype and axis metadata of a stack.

    ``spacing`` maps axis letters to physical sizes: ``X``/``Y`` pixel size and ``Z`` slice distance (in
    ``units[letter]``), ``T`` the time between frames. Only what the file holds is listed.
    """

    frames: int
    height: int
    width: int
    channels: int
    dtype: np.dtype
    axis: str = "I"
    flavour: str = "tiff"
    spacing: dict[str, float] = field(default_factory=dict)
    units: dict[str, str] = field(default_factory=dict)

    @property
    def frame_shape(self) -> tuple[int, int, int]:
        return self.height, self.width, self.channels

    @property
    def shape(self) -> tuple[int, int, int, int]:
        return self.frames, self.height, self.width, self.channels


def _check_dtype(path: Path, dtype: np.dtype) -> np.dtype:
    dtype = np.dtype(dtype)
    if dtype not in EXACT_INTEGER_DTYPES and dtype not in FLOAT_DTYPES:
        raise InputError(path, f"{dtype} stacks are not supported; convert to uint8, uint16 or float32")
    return dtype


def _check_finite(path: Path, frame: np.ndarray, index: int) -> np.ndarray:
    if frame.dtype.kind == "f" and not np.all(np.isfinite(frame)):
        raise InputError(path, f"frame {index} has NaN/Inf pixel values")
    return frame


class StackReader:
    """Read the frames of a stack one at a time; use as a context manager. ``read(i)`` returns ``(H, W, C)``."""

    info: StackInfo
    path: Path

    def read(self, index: int) -> np.ndarray:
        if not 0 <= index < self.info.frames:
            raise IndexError(f"frame {index} outside 0..{self.info.frames - 1}")
        return _check_finite(self.path, self._read(index), index)

    def _read(self, index: int) -> np.ndarray:
        raise NotImplementedError

    def close(self) -> None:
        pass

    def __enter__(self) -> "StackReader":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


# ------------------------------------------------------------------------------------------------------- TIFF


class _TiffStack(StackReader):
    def __init__(self, path: Path):
        self.path = path
        try:
            self._tiff = tifffile.TiffFile(path)
        except Exception as error:  # tifffile raises several types for files it cannot parse
            raise InputError(path, f"cannot read the TIFF ({type(error).__name__}: {error})") from None
        try:
            self._plan(path)
        except BaseException:
            self._tiff.close()
            raise

    def _plan(self, path: Path) -> None:
        tiff = self._tiff
        if not tiff.series:
            raise InputError(path, "TIFF file holds no image")
        # A plain multi-page file may come as one series per page; they must all share one frame shape.
        self._sources: list[tuple[tifffile.TiffPageSeries, int, int]] = []  # (series, frame in series, planes)
        frame_shape, dtype, axis = None, None, "I"
        for number, series in enumerate(tiff.series):
            axes, shape = series.axes, tuple(series.shape)
            if "Y" not in axes or "X" not in axes:
                raise InputError(path, f"TIFF series with axes '{axes}' has no image plane")
            sizes = dict(zip(axes, shape))
            moving = [letter for letter in axes if letter not in "YXSC" and sizes[letter] > 1]
            if len(moving) > 1:
                raise InputError(path, f"has {len(moving)} stack axes ({' x '.join(f'{a}={sizes[a]}' for a in moving)}); "
                                 "a stack is denoised along one axis: save each "
                                 f"{'time point' if 'T' in moving else moving[0]} as its own file")
            if "S" in axes and sizes.get("C", 1) > 1:
                raise InputError(path, f"TIFF series with axes '{axes}' has two channel axes")
            channels = sizes.get("S", sizes.get("C", 1))
            planes = sizes.get("C", 1)
            if planes > 1 and axes.index("C") != axes.index("Y") - 1:
                raise InputError(path, f"channel planes must come just before Y and X, axes are '{axes}'")
            this_shape = (sizes["Y"], sizes["X"], channels)
            if frame_shape is None:
                frame_shape, dtype = this_shape, np.dtype(series.dtype)
                axis = moving[0] if moving else next((a for a in axes if a in STACK_AXES), "I")
                axis = axis if axis in ("Z", "T") else "I"  # tifffile's Q (unknown) and others: unstated
            elif (this_shape, np.dtype(series.dtype)) != (frame_shape, dtype):
                raise InputError(path, f"frames have different shapes: page series {number} is "
                                 f"{this_shape[0]}x{this_shape[1]}x{this_shape[2]} {series.dtype}, the first is "
                                 f"{frame_shape[0]}x{frame_shape[1]}x{frame_shape[2]} {dtype}")
            frames = int(np.prod([sizes[a] for a in axes if a not in "YXSC"], dtype=np.int64))
            self._sources.extend((series, index, planes) for index in range(frames))
        self._dtype = _check_dtype(path, dtype)
        flavour = "imagej" if tiff.is_imagej else "ome" if tiff.is_ome else "tiff"
        spacing, units = (_imagej_spacing(tiff, axis) if flavour == "imagej" else
                          _ome_spacing(tiff) if flavour == "ome" else ({}, {}))
        self.info = StackInfo(len(self._sources), *frame_shape, dtype=self._dtype, axis=axis, flavour=flavour,
                              spacing=spacing, units=units)

    def _read(self, index: int) -> np.ndarray:
        series, position, planes = self._sources[index]
        height, width, channels = self.info.frame_shape
        frame_bytes = height * width * channels * self._dtype.itemsize
        if series.dataoffset is not None:  # contiguous and uncompressed: seek straight to the frame
            handle = self._tiff.filehandle
            handle.seek(series.dataoffset + position * frame_bytes)
            data = handle.read(frame_bytes)
            if len(data) != frame_bytes:
                raise InputError(self.path, f"file is truncated (frame {index} ends past the end of the file)")
            values = np.frombuffer(data, self._dtype.newbyteorder(self._tiff.byteorder)).astype(self._dtype)
            shape = (channels, height, width) if planes > 1 else (height, width, channels)
            values = values.reshape(shape)
            return np.ascontiguousarray(np.moveaxis(values, 0, -1)) if planes > 1 else values
        pages = [series.pages[position * planes + plane] for plane in range(planes)]
        if any(page is None for page in pages):
            raise InputError(self.path, f"frame {index} has no page of its own in this TIFF")
        arrays = [page.asarray() for page in pages]
        if planes > 1:
            return np.stack(arrays, axis=-1).astype(self._dtype, copy=False)
        return arrays[0].reshape(height, width, channels).astype(self._dtype, copy=False)

    def close(self) -> None:
        self._tiff.close()


def _imagej_spacing(tiff: tifffile.TiffFile, axis: str) -> tuple[dict[str, float], dict[str, str]]:
    metadata = tiff.imagej_metadata or {}
    spacing: dict[str, float] = {}
    units: dict[str, str] = {}
    unit = metadata.get("unit")
    page = tiff.pages.first
    for letter, code in (("X", 282), ("Y", 283)):
        tag = page.tags.get(code)
        if tag is not None and tag.value[0] and tuple(tag.value) != (1, 1):
            spacing[letter] = tag.value[1] / tag.value[0]  # resolution is pixels per unit
            if unit:
                units[letter] = unit
    if "spacing" in metadata:
        spacing["Z"] = float(metadata["spacing"])
        if unit:
            units["Z"] = unit
    if "finterval" in metadata:
        spacing["T"] = float(metadata["finterval"])
        units["T"] = "s"
    return spacing, units


def _ome_spacing(tiff: tifffile.TiffFile) -> tuple[dict[str, float], dict[str, str]]:
    spacing: dict[str, float] = {}
    units: dict[str, str] = {}
    try:
        root = ElementTree.fromstring(tiff.ome_metadata or "")
    except ElementTree.ParseError:
        return spacing, units
    pixels = root.find(".//{*}Pixels")
    if pixels is None:
        return spacing, units
    for letter in "XYZ":
        value = pixels.get(f"PhysicalSize{letter}")
        if value is not None:
            spacing[letter] = float(value)
            if pixels.get(f"PhysicalSize{letter}Unit"):
                units[letter] = pixels.get(f"PhysicalSize{letter}Unit")
    if pixels.get("TimeIncrement") is not None:
        spacing["T"] = float(pixels.get("TimeIncrement"))
        if pixels.get("TimeIncrementUnit"):
            units["T"] = pixels.get("TimeIncrementUnit")
    return spacing, units


# -------------------------------------------------------------------------------------------------------- npy


class _NpyStack(StackReader):
    def __init__(self, path: Path):
        self.path = path
        self._handle = open(path, "rb")
        try:
            version = np.lib.format.read_magic(self._handle)
            read_header = np.lib.format.read_array_header_1_0 if version == (1, 0) else np.lib.format.read_array_header_2_0
            shape, fortran, dtype = read_header(self._handle)
        except (ValueError, OSError) as error:
            self._handle.close()
            raise InputError(path, f"not a readable .npy file ({error})") from None
        if fortran or len(shape) not in (3, 4) or 0 in shape:
            self._handle.close()
            raise InputError(path, f"a stack .npy must be a C-order (N, H, W) or (N, H, W, C) array, got {shape}")
        self._offset = self._handle.tell()
        self._dtype = _check_dtype(path, dtype)
        frames, height, width = shape[:3]
        self.info = StackInfo(frames, height, width, shape[3] if len(shape) == 4 else 1, dtype=self._dtype.newbyteorder("="),
                              flavour="npy")

    def _read(self, index: int) -> np.ndarray:
        count = self.info.height * self.info.width * self.info.channels
        self._handle.seek(self._offset + index * count * self._dtype.itemsize)
        data = self._handle.read(count * self._dtype.itemsize)
        if len(data) != count * self._dtype.itemsize:
            raise InputError(self.path, f"file is truncated (frame {index} ends past the end of the file)")
        return np.frombuffer(data, self._dtype).astype(self.info.dtype).reshape(self.info.frame_shape)

    def close(self) -> None:
        self._handle.close()


# ---------------------------------------------------------------------------------------------------- folders


def numbered_frames(folder: str | Path) -> list[Path]:
    """The frame files of a folder in file-name order, checked to be numbered without a gap.

    The frame number is the last run of digits in each file name (``part_0007.tif`` is frame 7). Names are
    sorted as text, so the numbers must be zero-padded to the same width for name order to be frame order.

    Raises
    ------
    InputError
        No image files, a file without a number, a gap in the numbering (naming the file after the gap), or
        numbers out of name order.
    """
    folder = Path(folder)
    files = find_images(folder)
    if not files:
        raise InputError(folder, "no image files (PNG, TIFF, .npy) in this folder of frames")
    numbers = []
    for path in files:
        match = FRAME_NUMBER.search(path.stem)
        if match is None:
            raise InputError(path, "has no frame number in its name; a folder of frames needs numbered names "
                             "such as frame_0001.tif")
        numbers.append(int(match.group(1)))
    for previous, number, path, before in zip(numbers, numbers[1:], files[1:], files):
        if number <= previous:
            raise InputError(path, f"frame number {number} follows {previous} ({before.name}) in name order; "
                             "number the frames consecutively, zero-padded to one width")
    for previous, number, path, before in zip(numbers, numbers[1:], files[1:], files):
        if number > previous + 1:
            missing = f"frame {previous + 1}" if number == previous + 2 else f"frames {previous + 1} to {number - 1}"
            raise InputError(path, f"gap in the frame numbering: {before.name} is followed by {path.name} "
                             f"({missing} missing)")
    return files


def _frame_header(path: Path) -> tuple[tuple[int, int, int], np.dtype]:
    """Shape ``(H, W, C)`` and dtype of a single-frame file, from its header where that is cheap."""
    suffix = path.suffix.lower()
    if suffix in (".tif", ".tiff"):
        try:
            with tifffile.TiffFile(path) as tiff:
                if len(tiff.pages) == 1 and len(tiff.series) == 1:
                    series = tiff.series[0]
                    sizes = dict(zip(series.axes, series.shape))
                    if set(series.axes) <= set("YXS"):
                        return (sizes["Y"], sizes["X"], sizes.get("S", 1)), np.dtype(series.dtype)
        except Exception:  # the whole-file reader below names the problem
            pass
    frames = read_frames(path)
    if frames.shape[0] != 1:
        raise InputError(path, f"holds {frames.shape[0]} frames; a folder of frames needs one frame per file")
    return frames.shape[1:], frames.dtype


class _FolderStack(StackReader):
    def __init__(self, folder: Path):
        self.path = folder
        self.files = numbered_frames(folder)
        shape, dtype = _frame_header(self.files[0])
        for path in self.files[1:]:
            other, other_dtype = _frame_header(path)
            if (other, other_dtype) != (shape, dtype):
                raise InputError(path, f"frame is {other[0]}x{other[1]}x{other[2]} {other_dtype}, but "
                                 f"{self.files[0].name} is {shape[0]}x{shape[1]}x{shape[2]} {dtype}; all frames "
                                 "of a folder need one shape and dtype")
        self.info = StackInfo(len(self.files), *shape, dtype=_check_dtype(folder, dtype), flavour="folder")

    def _read(self, index: int) -> np.ndarray:
        frames = read_frames(self.files[index])
        if frames.shape[1:] != self.info.frame_shape or frames.dtype != self.info.dtype:
            raise InputError(self.files[index], "changed while the stack was being read")
        return frames[0]


def open_stack(path: str | Path) -> StackReader:
    """Open a stack for reading frame by frame: a TIFF or ``.npy`` file, or a folder of numbered frames.

    Raises
    ------
    InputError
        Missing or unreadable input, unsupported type, or one of the problems listed in the module docstring.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(path, "no such file or folder")
    if path.is_dir():
        return _FolderStack(path)
    suffix = path.suffix.lower()
    if path.stat().st_size == 0:
        raise InputError(path, "empty file (0 bytes)")
    if suffix in (".tif", ".tiff"):
        return _within_limits(_TiffStack(path))
    if suffix == ".npy":
        return _within_limits(_NpyStack(path))
    raise InputError(path, f"a stack must be a TIFF or .npy file or a folder of numbered frames, not '{path.suffix}'")


def _within_limits(reader: StackReader) -> StackReader:
    """Refuse, before any frame is decoded, a stack whose frames (each read whole) exceed the size limits."""
    try:
        check_declared_size(reader.path, *reader.info.frame_shape, reader.info.dtype, streamable=None)
    except BaseException:
        reader.close()
        raise
    return reader


def read_stack(path: str | Path) -> tuple[np.ndarray, StackInfo]:
    """The whole stack as ``(N, H, W, C)`` with its :class:`StackInfo` (for stacks that fit in memory)."""
    with open_stack(path) as reader:
        check_declared_size(path, *reader.info.frame_shape, reader.info.dtype, reader.info.frames, streamable=None)
        frames = np.stack([reader.read(index) for index in range(reader.info.frames)])
        return frames, reader.info


# ------------------------------------------------------------------------------------------------------ write


def write_stack(
    path: str | Path,
    frames: Iterable[np.ndarray],
    info: StackInfo,
    *,
    text: str | None = None,
    overwrite: bool = False,
    durable: bool = False,
) -> Path:
    """Write ``info.frames`` frames ``(H, W, C)`` as they come, atomically, keeping ``info``'s axis metadata.

    Parameters
    ----------
    path : path
        ``.tif``/``.tiff`` or ``.npy``.
    frames : iterable of arrays
        Exactly ``info.frames`` arrays of ``info.frame_shape``, already in ``info.dtype``.
    info : StackInfo
        Shape, dtype, stack axis and spacing. A TIFF is written in ``info.flavour``: ImageJ hyperstack (axes,
        ``spacing``, ``unit``, ``finterval``, X/Y resolution; uint8, uint16 or float32 only, else a plain
        TIFF), OME-TIFF (``PhysicalSize*`` with units, ``TimeIncrement``), or plain multi-page TIFF for the
        other flavours.
    text : str, optional
        Stored with the stack: ImageJ ``Info`` property, OME ``Image/Description``, the ImageDescription of a
        plain TIFF's first page, or the ``NAME.npy.json`` sidecar.
    overwrite : bool
        Replace an existing file; without it an existing file raises ``InputError``.
    durable : bool
        ``fsync`` the file and its folder before returning.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".tif", ".tiff", ".npy"):
        raise InputError(path, f"a stack is written as TIFF or .npy, not '{path.suffix}'")
    if path.exists() and not overwrite:
        raise InputError(path, "already exists (not overwritten without the overwrite option)")
    path.parent.mkdir(parents=True, exist_ok=True)
    checked = _checked_frames(path, frames, info)
    with atomic_path(path, durable=durable) as temporary:
        if suffix == ".npy":
            _write_npy(temporary, checked, info)
        else:
            _write_tiff_stack(temporary, checked, info, text)
    if suffix == ".npy" and text is not None:
        write_json_atomic(Path(str(path) + ".json"), {"text": text}, durable=durable, indent=1)
    return path


def _checked_frames(path: Path, frames: Iterable[np.ndarray], info: StackInfo) -> Iterator[np.ndarray]:
    count = 0
    for frame in frames:
        if count == info.frames:
            raise InputError(path, f"more than the {info.frames} frames announced")
        frame = np.asarray(frame)
        if frame.shape != info.frame_shape or frame.dtype != info.dtype:
            raise InputError(path, f"frame {count} is {frame.shape} {frame.dtype}, expected {info.frame_shape} "
                             f"{info.dtype}")
        count += 1
        yield np.ascontiguousarray(frame)
    if count != info.frames:
        raise InputError(path, f"only {count} of the {info.frames} frames announced")


def _write_npy(temporary: str, frames: Iterator[np.ndarray], info: StackInfo) -> None:
    shape = info.shape if info.channels > 1 else info.shape[:3]
    header = {"descr": np.lib.format.dtype_to_descr(info.dtype), "fortran_order": False, "shape": shape}
    with open(temporary, "wb") as out:
        np.lib.format.write_array_header_2_0(out, header)
        for frame in frames:
            out.write(frame.tobytes())


def _write_tiff_stack(temporary: str, frames: Iterator[np.ndarray], info: StackInfo, text: str | None) -> None:
    colour = info.channels in (3, 4) and info.dtype == np.uint8
    samples = info.channels > 1
    shape = info.shape if samples else info.shape[:3]
    axes = info.axis + "YX" + ("S" if samples else "")
    pages = (frame if samples else frame[:, :, 0] for frame in frames)
    options = {"photometric": "rgb" if colour else "minisblack", "planarconfig": "contig" if samples else None}
    size = int(np.prod(info.shape, dtype=np.int64)) * info.dtype.itemsize
    flavour = info.flavour
    if flavour == "imagej" and (info.dtype not in IMAGEJ_DTYPES or (samples and not colour)):
        flavour = "tiff"  # ImageJ holds only these types, and planes rather than samples for non-RGB channels
    if flavour == "imagej":
        metadata: dict[str, object] = {"axes": axes}
        unit = next((info.units[a] for a in "XYZ" if a in info.units), None)
        if unit:
            metadata["unit"] = unit
        if "Z" in info.spacing:
            metadata["spacing"] = info.spacing["Z"]
        if "T" in info.spacing:
            metadata["finterval"] = info.spacing["T"]
        if text is not None:
            metadata["Info"] = text
        resolution = None
        if "X" in info.spacing and "Y" in info.spacing:
            resolution = (1.0 / info.spacing["X"], 1.0 / info.spacing["Y"])
        tifffile.imwrite(temporary, pages, shape=shape, dtype=info.dtype, imagej=True, metadata=metadata,
                         resolution=resolution, **options)
    elif flavour == "ome":
        metadata = {"axes": axes}
        for letter in "XYZ":
            if letter in info.spacing:
                metadata[f"PhysicalSize{letter}"] = info.spacing[letter]
                if letter in info.units:
                    metadata[f"PhysicalSize{letter}Unit"] = info.units[letter]
        if "T" in info.spacing:
            metadata["TimeIncrement"] = info.spacing["T"]
            if "T" in info.units:
                metadata["TimeIncrementUnit"] = info.units["T"]
        if text is not None:
            metadata["Description"] = text
        tifffile.imwrite(temporary, pages, shape=shape, dtype=info.dtype, ome=True, metadata=metadata,
                         bigtiff=size > 2**31, **options)
    else:
        tifffile.imwrite(temporary, pages, shape=shape, dtype=info.dtype, metadata=None, description=text,
                         bigtiff=size > 2**31, **options)


def same_flavour(info: StackInfo, *, dtype: np.dtype | None = None, suffix: str = ".tif") -> StackInfo:
    """``info`` for an output of another dtype or file type (npy outputs carry no axis metadata)."""
    flavour = info.flavour if suffix.lower() in (".tif", ".tiff") and info.flavour in ("imagej", "ome") else (
        "npy" if suffix.lower() == ".npy" else "tiff")
    return replace(info, dtype=np.dtype(dtype or info.dtype), flavour=flavour)
