"""Denoise a batch of files safely: mirrored output names, resumable, traceable, never losing data.

:func:`denoise_files` is the generator behind ``grainwright denoise``. For each input it yields a
:class:`FileResult` (done, skipped or failed). Rules:

- outputs mirror the input names under the output folder (a folder argument keeps its sub-folders), in the
  input's format, dtype and channel count unless told otherwise;
- nothing is written into an input's folder unless asked, nothing overwrites an input ever, and nothing
  overwrites an existing output without ``overwrite``; every output is written under a temporary name in its
  folder and renamed when complete;
- each output carries a JSON record (model SHA-256 and settings) in its TIFF ImageDescription, PNG text chunk or
  ``.npy.json`` sidecar; an existing output with the same record is skipped (so a killed batch resumes), and a
  batch whose model or settings changed refuses to start unless the caller allows mixing or overwriting;
- a file that cannot be processed is reported (one line naming the file and the reason, classified by
  :mod:`grainwright.inference.runtime.faults`) and skipped; the batch goes on, except when the output device is
  full or read-only, where it stops after that file since every later one would fail the same way;
- temporary files a killed earlier run left in the output folders are removed before starting (only this
  host's, whose process is gone: see :func:`grainwright.inference.common.atomic.remove_stale_temporaries`).

:func:`denoise_file` is the per-file engine shared by this batch, the line service and the cluster path.
"""
from __future__ import annotations

import json
import math
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
from tqdm import tqdm

from grainwright.inference import __version__
from grainwright.inference.common.atomic import remove_stale_temporaries
from grainwright.inference.common.errors import GrainwrightError, InputError
from grainwright.inference.images.crops import centre_box
from grainwright.inference.images.imageio import (
    SUPPORTED_SUFFIXES,
    effective_bit_depth,
    find_images,
    read_frames,
    read_text,
    write_image,
)
from grainwright.inference.images.large_tiff import (
    WRITABLE_COMPRESSION,
    TiffRowReader,
    can_stream,
    write_tiled_tiff,
)
from grainwright.inference.images.stacks import open_stack, same_flavour, write_stack
from grainwright.inference.noise.estimation import (
    correct_fixed_pattern,
    detect_banding,
    estimate_sigma,
)
from grainwright.inference.runtime.faults import Fault, FaultKind, input_fault, model_fault, write_fault
from grainwright.inference.runtime.runner import OnnxDenoiser, file_sha256, to_dtype
from grainwright.inference.runtime.stack_window import check_stack, denoise_stack
from grainwright.inference.runtime.tiling import TIFF_TILE_MULTIPLE, reflect_indices

RECORD_TOOL = "grainwright denoise"
# Warn when an input's noise level or full-scale range differs from the training data by more than this factor.
DOMAIN_FACTOR = 2.0
# Edge of the central crop a streamed frame's noise level and bit depth are estimated on (pixels).
SAMPLE_EDGE = 1024
# Below this edge (pixels) the wavelet MAD estimate has too few coefficients to be worth a warning.
MIN_ESTIMATE_EDGE = 16
# When to remove row/column banding before the model sees a frame (the trainer does the same before training).
FIXED_PATTERN_MODES = ("auto", "always", "never")


@dataclass
class FileResult:
    """What happened to one input file."""

    source: Path
    output: Path | None
    status: str  # "done", "skipped" or "failed"
    message: str = ""
    megapixels: float = 0.0
    seconds: float = 0.0
    warnings: list[str] = field(default_factory=list)
    fault: Fault | None = None  # why it failed (kind, file, reason); None unless status is "failed"


@dataclass(frozen=True)
class Job:
    source: Path
    output: Path


def plan_jobs(
    inputs: list[str | Path], out_dir: Path, *, recursive: bool = False, suffix: str | None = None,
    frame_folders: bool = False,
) -> list[Job]:
    """Pair each input file with its output path under ``out_dir`` (``suffix`` replaces the input's).

    With ``frame_folders``, each folder given is one stack of numbered frames (name order, see
    :func:`grainwright.inference.images.stacks.numbered_frames`), written as one stack file
    ``out_dir/FOLDER.tif`` (or ``FOLDER`` + ``suffix``)."""
    jobs: dict[Path, Job] = {}
    out_resolved = out_dir.resolve()
    for entry in inputs:
        entry = Path(entry)
        if frame_folders and entry.is_dir():
            output = out_dir / (entry.resolve().name + (suffix or ".tif"))
            if output in jobs and jobs[output].source != entry:
                raise InputError(entry, f"has the same output name as {jobs[output].source} ({output})")
            jobs.setdefault(output, Job(entry, output))
            continue
        # An output folder inside an input folder holds earlier outputs, not inputs.
        nested = entry.is_dir() and entry.resolve() in out_resolved.parents
        for source in find_images([entry], recursive=recursive):
            if nested and out_resolved in source.resolve().parents:
                continue
            relative = source.relative_to(entry) if entry.is_dir() else Path(source.name)
            output = out_dir / relative
            if suffix is not None:
                output = output.with_suffix(suffix)
            if output in jobs and jobs[output].source != source:
                raise InputError(source, f"has the same output name as {jobs[output].source} ({output})")
            jobs.setdefault(output, Job(source, output))
    return list(jobs.values())


def read_record(path: Path) -> dict[str, Any] | None:
    """The grainwright record stored in an output, or None when there is none."""
    try:
        text = read_text(path)
        record = json.loads(text) if text else None
    except (OSError, ValueError, InputError):
        return None
    return record if isinstance(record, dict) and record.get("tool") == RECORD_TOOL else None


def _same_run(record: dict[str, Any], expected: dict[str, Any]) -> bool:
    return record.get("model_sha256") == expected["model_sha256"] and record.get("settings") == expected["settings"]


def domain_warnings(denoiser: OnnxDenoiser, sample: np.ndarray) -> list[str]:
    """Compare an input's noise level (MAD estimate, Donoho & Johnstone 1994) and effective bit depth with what
    the model saw in training; one line per figure off by more than ``DOMAIN_FACTOR``. ``sample`` is the
    central ``SAMPLE_EDGE`` square (or all) of a file's first frame."""
    spec, notes = denoiser.spec, []
    if spec.training_sigma and min(sample.shape[:2]) >= MIN_ESTIMATE_EDGE:
        sigma = float(np.mean(estimate_sigma(sample)))
        ratio = sigma / spec.training_sigma
        if not 1 / DOMAIN_FACTOR <= ratio <= DOMAIN_FACTOR:
            notes.append(f"noise level {sigma:.3g} is {ratio:.2g}x the training level {spec.training_sigma:.3g} "
                         "(native units); results may be poor")
    bits = effective_bit_depth(sample)
    if bits is not None and spec.training_bit_depth:
        ratio = 2.0 ** (bits - spec.training_bit_depth)
        if not 1 / DOMAIN_FACTOR <= ratio <= DOMAIN_FACTOR:
            notes.append(f"effective bit depth {bits} differs from the training data's {spec.training_bit_depth}")
    return notes


def _noise_note(denoiser: OnnxDenoiser) -> str | None:
    return "per pixel from the training noise model" if denoiser.noise_model is not None else None


STACK_SUFFIXES = (".tif", ".tiff", ".npy")  # what a folder of frames can be written as (one stack file)


def _checked_jobs(inputs: list[str | Path], out_dir: Path, *, recursive: bool, out_format: str | None,
                  into_input_folder: bool, frame_folders: bool = False) -> list[Job]:
    """The files to denoise and their outputs; refuses an unknown format, no inputs, a frame folder written as
    PNG, and (unless ``into_input_folder``) an output folder that holds an input."""
    suffix = None if out_format is None else "." + out_format.lower().lstrip(".")
    if suffix is not None and suffix not in SUPPORTED_SUFFIXES:
        raise GrainwrightError(f"--format must be one of {', '.join(s[1:] for s in SUPPORTED_SUFFIXES)}")
    jobs = plan_jobs(inputs, out_dir, recursive=recursive, suffix=suffix, frame_folders=frame_folders)
    if not jobs:
        raise GrainwrightError("no input images found (supported: " + ", ".join(SUPPORTED_SUFFIXES) + ")")
    for job in jobs:
        if job.source.is_dir() and job.output.suffix.lower() not in STACK_SUFFIXES:
            raise InputError(job.source, "a folder of frames is written as one stack file: TIFF or .npy, not "
                             f"{job.output.suffix}")
    if not into_input_folder:
        for job in jobs:
            holder = job.source if job.source.is_dir() else job.source.parent
            if job.output.parent.resolve() == holder.resolve():
                raise GrainwrightError(f"output folder {job.output.parent} holds the input {job.source}; choose "
                                       "another -o folder, or allow it with --into-input-folder")
    return jobs


def _refuse_mixed_outputs(jobs: list[Job], expected: dict[str, Any], out_dir: Path) -> None:
    """Refuse to go on when existing outputs were made with another model or other settings."""
    changed = [job.output for job in jobs if job.output.exists()
               and (record := read_record(job.output)) is not None and not _same_run(record, expected)]
    if changed:
        raise GrainwrightError(
            f"{len(changed)} existing output(s) in {out_dir} were made with another model or other settings "
            f"(first: {changed[0]}); use --overwrite to redo them, --keep-mixed to keep them and go on, or "
            "another -o folder")


def plan_batch(
    denoiser: OnnxDenoiser,
    inputs: list[str | Path],
    out_dir: str | Path,
    *,
    recursive: bool = False,
    out_format: str | None = None,
    as_float: bool = False,
    overwrite: bool = False,
    keep_mixed: bool = False,
    into_input_folder: bool = False,
    fixed_pattern: str = "auto",
    slice_wise: bool = False,
    frame_folders: bool = False,
) -> tuple[list[Job], dict[str, Any]]:
    """The checks a batch makes before writing anything, and its plan: the jobs and the expected record.

    Shared by :func:`denoise_files` and the cluster path (parameters and errors as in :func:`denoise_files`).
    """
    if fixed_pattern not in FIXED_PATTERN_MODES:
        raise GrainwrightError(f"fixed-pattern mode must be one of {', '.join(FIXED_PATTERN_MODES)}, "
                               f"got {fixed_pattern!r}")
    if slice_wise and denoiser.spec.stack_frames > 1:
        raise InputError(denoiser.path, f"reads {denoiser.spec.stack_frames} frames per output frame; slice-wise "
                         "denoising takes a single-frame model (each slice on its own)")
    jobs = _checked_jobs(inputs, Path(out_dir), recursive=recursive, out_format=out_format,
                         into_input_folder=into_input_folder, frame_folders=frame_folders)
    expected = expected_record(denoiser, out_format=out_format, as_float=as_float, fixed_pattern=fixed_pattern,
                               slice_wise=slice_wise)
    if not overwrite and not keep_mixed:
        _refuse_mixed_outputs(jobs, expected, Path(out_dir))
    return jobs, expected


def denoise_files(
    denoiser: OnnxDenoiser,
    inputs: list[str | Path],
    out_dir: str | Path,
    *,
    recursive: bool = False,
    out_format: str | None = None,
    as_float: bool = False,
    overwrite: bool = False,
    keep_mixed: bool = False,
    into_input_folder: bool = False,
    fixed_pattern: str = "auto",
    slice_wise: bool = False,
    frame_folders: bool = False,
    progress: bool = False,
) -> Iterator[FileResult]:
    """Denoise files into ``out_dir``, yielding one :class:`FileResult` per input.

    Parameters
    ----------
    denoiser : OnnxDenoiser
        The model and its settings.
    inputs : list of paths
        Files, folders and glob patterns.
    out_dir : path
        Output folder (created when missing).
    recursive : bool
        Descend into sub-folders of folder inputs; outputs keep the sub-folder layout.
    out_format : {"tif", "png", "npy"}, optional
        Write this format instead of the input's.
    as_float : bool
        Write float32 native values (unclipped) instead of the input's dtype (TIFF and npy only).
    overwrite : bool
        Redo and replace existing outputs (inputs are never overwritten).
    keep_mixed : bool
        Let a batch go on although existing outputs were made with another model or settings (they are kept).
    into_input_folder : bool
        Allow ``out_dir`` to be an input's own folder.
    fixed_pattern : {"auto", "always", "never"}
        Remove row/column banding (``estimation.correct_fixed_pattern``) before denoising: ``auto`` when
        ``estimation.detect_banding`` flags the frame. Self-supervised models cannot remove a fixed pattern
        themselves. Streamed (tiled or striped) TIFFs are never corrected, since the estimate needs whole rows
        and columns; their result carries a note when a correction was asked for.
    slice_wise : bool
        Denoise every frame (slice) of a multi-frame file on its own with a single-frame model, through the
        stack path: one frame at a time in bounded memory, the output keeping the file's axes and voxel size
        (docs/stacks-and-volumes.md). Refused with a multi-frame model.
    frame_folders : bool
        Read each folder given as one stack of numbered frames and write it as one stack file
        ``out_dir/FOLDER.tif`` (``.npy`` with ``out_format="npy"``); a multi-frame model slides its window
        along the frames, a single-frame model denoises them one by one.
    progress : bool
        Show tqdm bars over files and tiles.

    Raises
    ------
    GrainwrightError
        Before anything is written: no inputs, output folder is an input folder, or existing outputs made with
        another model or settings (unless ``overwrite`` or ``keep_mixed``).
    """
    jobs, expected = plan_batch(denoiser, inputs, out_dir, recursive=recursive, out_format=out_format,
                                as_float=as_float, overwrite=overwrite, keep_mixed=keep_mixed,
                                into_input_folder=into_input_folder, fixed_pattern=fixed_pattern,
                                slice_wise=slice_wise, frame_folders=frame_folders)
    for folder in sorted({job.output.parent for job in jobs}):
        remove_stale_temporaries(folder)  # what a killed earlier run left; never another host's or live process's
    files_bar = tqdm(total=len(jobs), unit="file", disable=not progress, position=0)
    tiles_bar = tqdm(unit="tile", disable=not progress, position=1, leave=False)
    try:
        for job in jobs:
            result = denoise_file(denoiser, job, expected, overwrite=overwrite, as_float=as_float,
                                  fixed_pattern=fixed_pattern, tiles_bar=tiles_bar)
            files_bar.update(1)
            yield result
            if result.fault is not None and result.fault.kind.stops_batch:
                return  # every later file would fail the same way; the caller reports how many were done
    finally:
        tiles_bar.close()
        files_bar.close()


class _FileFault(Exception):
    """Carries a classified per-file fault out of the nested read/run/write code to :func:`denoise_file`."""

    def __init__(self, fault: Fault):
        super().__init__(str(fault))
        self.fault = fault


def _guard(classify: Callable[[BaseException, Path], Fault], path: Path, call: Callable[..., Any],
           *args: Any, **kwargs: Any) -> Any:
    """``call(*args, **kwargs)``, with any failure classified for ``path`` (an inner classification wins)."""
    try:
        return call(*args, **kwargs)
    except _FileFault:
        raise
    except (Exception, MemoryError) as error:
        raise _FileFault(classify(error, path)) from error


def _guarded(items: Iterator[Any], classify: Callable[[BaseException, Path], Fault], path: Path) -> Iterator[Any]:
    """Iterate ``items`` with each step's failure classified for ``path``."""
    while True:
        try:
            item = next(items)
        except StopIteration:
            return
        except _FileFault:
            raise
        except (Exception, MemoryError) as error:
            raise _FileFault(classify(error, path)) from error
        yield item


def new_record(denoiser: OnnxDenoiser, source: Path, expected: dict[str, Any]) -> dict[str, Any]:
    """The traceability record an output carries: model hash, settings, tool version, source name, time."""
    return {
        "tool": RECORD_TOOL,
        "version": __version__,
        "model": denoiser.path.name,
        **expected,
        "architecture": denoiser.spec.architecture,
        "tile": denoiser.tile,
        "margin": denoiser.spec.margin,
        "source": source.name,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
    }


def expected_record(denoiser: OnnxDenoiser, *, out_format: str | None = None, as_float: bool = False,
                    fixed_pattern: str = "auto", slice_wise: bool = False) -> dict[str, Any]:
    """What identifies a run for the skip-what-is-done check: the model's hash and the output settings
    (``slice_wise`` only when set, so that earlier outputs keep matching)."""
    settings = {**denoiser.settings(), "format": out_format, "float32": as_float, "fixed_pattern": fixed_pattern}
    if slice_wise:
        settings["slice_wise"] = True
    return {"model_sha256": file_sha256(denoiser.path), "settings": settings}


def denoise_file(denoiser: OnnxDenoiser, job: Job, expected: dict[str, Any], *, overwrite: bool = False,
                 as_float: bool = False, fixed_pattern: str = "auto", durable: bool = False,
                 tiles_bar: tqdm | None = None, extra_record: dict[str, Any] | None = None) -> FileResult:
    """Denoise one file: the per-file engine behind ``denoise``, the line service and the cluster path.

    Never raises for a per-file fault: the result's ``fault`` says what went wrong (see
    :mod:`grainwright.inference.runtime.faults`) and the output is left as it was. ``durable`` also ``fsync``s
    the output and its folder before returning. ``extra_record`` adds keys to the output's record (for example
    which worker made it).
    """
    start = time.perf_counter()
    source, output = job.source, job.output
    tiles_bar = tiles_bar if tiles_bar is not None else tqdm(disable=True)
    try:
        if output.exists() and output.resolve() == source.resolve():
            raise _FileFault(Fault(FaultKind.INPUT, source, "output would overwrite this input; choose another "
                                   "-o folder"))
        if output.exists() and not overwrite:
            record = read_record(output)
            if record is not None and _same_run(record, expected):
                return FileResult(source, output, "skipped", "already done with this model and settings")
            if record is None:
                raise _FileFault(Fault(FaultKind.WRITE, output, "exists and was not written by grainwright denoise "
                                       "(use --overwrite)"))
            return FileResult(source, output, "skipped", "kept (made with another model or settings)")
        _guard(write_fault, output, output.parent.mkdir, parents=True, exist_ok=True)
        record = {**new_record(denoiser, source, expected), **(extra_record or {})}
        # A multi-frame model slides its window along the file's frames; slice-wise runs and folders of frames
        # also go frame by frame through the stack path (bounded memory, axes and voxel size kept).
        stacked = denoiser.spec.stack_frames > 1 or bool(expected["settings"].get("slice_wise")) or source.is_dir()
        streamed = not stacked and output.suffix.lower() in (".tif", ".tiff") \
            and source.suffix.lower() in (".tif", ".tiff") and _guard(input_fault, source, can_stream, source)
        if stacked:
            megapixels, notes = _stack(denoiser, source, output, record, overwrite=overwrite, as_float=as_float,
                                       fixed_pattern=fixed_pattern, durable=durable, tiles_bar=tiles_bar)
        elif streamed:
            megapixels, notes = _stream_tiff(denoiser, source, output, record, overwrite=overwrite,
                                             as_float=as_float, durable=durable, tiles_bar=tiles_bar)
            if fixed_pattern != "never":
                notes.append("fixed-pattern correction is not applied to streamed TIFFs (it needs whole rows)")
        else:
            megapixels, notes = _in_memory(denoiser, source, output, record, overwrite=overwrite,
                                           as_float=as_float, fixed_pattern=fixed_pattern, durable=durable,
                                           tiles_bar=tiles_bar)
    except _FileFault as failure:
        return FileResult(source, None, "failed", str(failure.fault), seconds=time.perf_counter() - start,
                          fault=failure.fault)
    return FileResult(source, output, "done", "", megapixels, time.perf_counter() - start, notes)


def denoise_frame(denoiser: OnnxDenoiser, frame: np.ndarray, *, fixed_pattern: str = "auto", as_float: bool = False,
                  progress: Callable[[int], Any] | None = None) -> tuple[np.ndarray, bool, float | None]:
    """Denoise one in-memory ``(H, W, C)`` frame exactly as :func:`denoise_file` does for a decoded file.

    Returns the output (the frame's dtype, clipped and rounded, or float32 native values with ``as_float``),
    whether row/column banding was removed first (``fixed_pattern``, see :func:`denoise_files`) and the noise
    level used (native units; None for models without a noise map).
    """
    correct = fixed_pattern == "always" or (fixed_pattern == "auto" and detect_banding(frame).flagged)
    model_input = correct_fixed_pattern(frame) if correct else frame
    level = denoiser.sigma_for(model_input)
    values = denoiser.run(model_input, sigma=level, as_float=True, progress=progress)
    return (values if as_float else to_dtype(values, frame.dtype, denoiser.spec)), correct, level


def _in_memory(denoiser: OnnxDenoiser, source: Path, output: Path, record: dict[str, Any], *, overwrite: bool,
               as_float: bool, fixed_pattern: str, durable: bool, tiles_bar: tqdm) -> tuple[float, list[str]]:
    frames = _guard(input_fault, source, read_frames, source)
    count, height, width, channels = frames.shape
    _guard(input_fault, source, denoiser.check_channels, channels, source)
    sample_rows, sample_cols = centre_box(height, width, SAMPLE_EDGE)
    notes = domain_warnings(denoiser, frames[0, sample_rows, sample_cols])
    if height * width >= 4_000_000:
        needed = frames.nbytes + count * height * width * channels * 4 * 3
        notes.append(f"decoded whole (not a tiled or striped TIFF): needs about {needed / 2**20:.0f} MiB")
    plan = denoiser.plan(height, width)
    tiles_bar.reset(total=len(plan.tiles) * count)
    levels, results, corrected = [], [], []
    for frame in frames:
        values, correct, level = _guard(model_fault, source, denoise_frame, denoiser, frame,
                                        fixed_pattern=fixed_pattern, as_float=as_float, progress=tiles_bar.update)
        results.append(values)
        corrected.append(correct)
        levels.append(level)
    record["fixed_pattern_corrected"] = corrected
    if any(corrected):
        notes.append(f"row/column banding removed before denoising in {sum(corrected)} of {count} frame(s)")
    record["noise_sigma_used"] = _noise_note(denoiser) or (levels if denoiser.spec.takes_noise_map else None)
    stack = np.stack(results)
    _guard(write_fault, output, write_image, output, stack[0] if count == 1 else stack, text=json.dumps(record),
           overwrite=overwrite, durable=durable)
    return count * height * width / 1e6, notes


def _stream_tiff(denoiser: OnnxDenoiser, source: Path, output: Path, record: dict[str, Any], *, overwrite: bool,
                 as_float: bool, durable: bool, tiles_bar: tqdm) -> tuple[float, list[str]]:
    with _guard(input_fault, source, TiffRowReader, source) as reader:
        height, width, channels = reader.shape
        _guard(input_fault, source, denoiser.check_channels, channels, source)
        sample_rows, sample_cols = centre_box(height, width, SAMPLE_EDGE)

        def central_sample(frame: int) -> np.ndarray:
            return reader.read_block(frame, sample_rows.start, sample_rows.stop, sample_cols.start,
                                     sample_cols.stop)

        notes = domain_warnings(denoiser, central_sample(0))
        # The kept rectangle is also the output TIFF tile, so it sits on the 16-pixel TIFF grid.
        plan = denoiser.plan(height, width, step=math.lcm(TIFF_TILE_MULTIPLE, denoiser.spec.alignment))
        rows = reflect_indices(plan.padded_height, height)
        cols = reflect_indices(plan.padded_width, width)
        identity_cols = plan.padded_width == width
        out_dtype = np.dtype(np.float32) if as_float else reader.dtype
        tiles_bar.reset(total=len(plan.tiles) * reader.frames)

        def frame_tiles(frame: int) -> Iterator[np.ndarray]:
            def read_padded_rows(top: int, bottom: int) -> np.ndarray:
                # Copies only where the padding reflects rows or columns: a band of a wide image is large.
                wanted = rows[top:bottom]
                first, last = int(wanted.min()), int(wanted.max()) + 1
                band = _guard(input_fault, source, reader.read_rows, frame, first, last)
                if not np.array_equal(wanted, np.arange(first, last)):
                    band = band[wanted - first]
                return band if identity_cols else band[:, cols]

            crop = central_sample(frame) if denoiser.spec.takes_noise_map else None
            level = denoiser.sigma_for(crop)
            tiles = denoiser.kept_tiles(plan, read_padded_rows, level, tiles_bar.update)
            for _, kept in _guarded(tiles, model_fault, source):
                yield kept if as_float else to_dtype(kept, out_dtype, denoiser.spec)

        if not denoiser.spec.takes_noise_map or denoiser.noise_sigma == "model":
            record["noise_sigma_used"] = _noise_note(denoiser)
        elif denoiser.noise_sigma == "estimate":
            # The record is written with the first page, before later frames are read: name the method instead.
            sample_height, sample_width = sample_rows.stop - sample_rows.start, sample_cols.stop - sample_cols.start
            record["noise_sigma_used"] = f"estimated per frame on the central {sample_height} x {sample_width} pixels"
            notes.append(record["noise_sigma_used"])
        else:
            record["noise_sigma_used"] = denoiser.sigma_for(None)
        _guard(write_fault, output, write_tiled_tiff,
               output, (frame_tiles(frame) for frame in range(reader.frames)),
               shape=(height, width, channels), dtype=out_dtype, tile=plan.tile, description=json.dumps(record),
               compression=WRITABLE_COMPRESSION.get(reader.compression), count=reader.frames, overwrite=overwrite,
               durable=durable)
        return reader.frames * height * width / 1e6, notes


def _stack_outputs(denoiser: OnnxDenoiser, read: Callable[[int], np.ndarray], count: int,
                   tiles_bar: tqdm) -> Iterator[np.ndarray]:
    """The output frames of a stack: the multi-frame model's sliding window, or a single-frame model on each frame
    alone (slice-wise); ``(H, W, C)`` float32 native values."""
    if denoiser.spec.stack_frames > 1:
        yield from denoise_stack(denoiser, read, count, progress=tiles_bar.update)
        return
    for index in range(count):
        frame = read(index)
        yield denoiser.run(frame, sigma=denoiser.sigma_for(frame), as_float=True, progress=tiles_bar.update)


def _stack(denoiser: OnnxDenoiser, source: Path, output: Path, record: dict[str, Any], *, overwrite: bool,
           as_float: bool, fixed_pattern: str, durable: bool, tiles_bar: tqdm) -> tuple[float, list[str]]:
    """A multi-frame model over a stack or volume, frame by frame in bounded memory
    (:mod:`grainwright.inference.runtime.stack_window`); the output keeps the input's axes and voxel size."""
    with _guard(input_fault, source, open_stack, source) as reader:
        info = reader.info
        _guard(input_fault, source, check_stack, denoiser, info.frames, info.channels, source)
        sample_rows, sample_cols = centre_box(info.height, info.width, SAMPLE_EDGE)
        notes = domain_warnings(denoiser, _guard(input_fault, source, reader.read, 0)[sample_rows, sample_cols])
        corrected = []

        def read(index: int) -> np.ndarray:
            frame = _guard(input_fault, source, reader.read, index)
            correct = fixed_pattern == "always" or (fixed_pattern == "auto" and detect_banding(frame).flagged)
            corrected.append(correct)
            return correct_fixed_pattern(frame) if correct else frame

        # The record goes into the file's header, before the frames are read: name the rule, count afterwards.
        record["fixed_pattern_corrected"] = f"{fixed_pattern}: decided per frame"
        record["stack"] = {"frames": info.frames, "axis": info.axis, "window": denoiser.spec.stack_frames,
                           "ends": "reflect"}
        if denoiser.spec.stack_alignment != "none":
            record["stack"]["align_neighbours"] = denoiser.spec.stack_alignment
            record["stack"]["align_revision"] = denoiser.spec.stack_align_revision
        tiles_bar.reset(total=len(denoiser.plan(info.height, info.width).tiles) * info.frames)
        outputs = _guarded(_stack_outputs(denoiser, read, info.frames, tiles_bar), model_fault, source)
        out_info = same_flavour(info, dtype=np.float32 if as_float else info.dtype, suffix=output.suffix)
        frames = (values if as_float else to_dtype(values, info.dtype, denoiser.spec) for values in outputs)
        _guard(write_fault, output, write_stack, output, frames, out_info, text=json.dumps(record),
               overwrite=overwrite, durable=durable)
    if any(corrected):
        notes.append(f"row/column banding removed before denoising in {sum(corrected)} of {info.frames} frame(s)")
    return info.frames * info.height * info.width / 1e6, notes
