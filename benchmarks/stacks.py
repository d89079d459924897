"""``grainwright bench stacks``: multi-frame models against single-frame ones and classical filters.

Runtime part (side by side in one run, ratios):

- seconds per megapixel per output frame of a K-frame ``unet-stack`` against the ``unet-small`` of the same
  width and levels (random weights: speed does not depend on them), through the runtime's own paths
  (``stack_window.denoise_stack_array`` and ``OnnxDenoiser.run``), interleaved repetitions, median; and of the
  same K-frame model with its neighbours aligned (``model.align_neighbours``: by optical flow, and by dominant
  whole-pixel shifts), whose motion estimates and warps are part of the time. The stack is noise with a band
  across its middle third moving 3 pixels per frame over a still rest, so that both alignments find motion and
  do all their work;
- peak resident memory of ``grainwright denoise`` in a fresh process on a generated 200-slice and a 2,000-slice
  volume (ImageJ z-stacks), with the K-frame model.

Quality part (noisy frames only, the budget per model in minutes, one run per seed):

- the generated conveyor sequence (:func:`grainwright.inference.synthetic.stack_scenario.conveyor_sequence`):
  K-frame model (``recorrupted-stack`` at its default strength with its neighbours aligned to the centre frame,
  by ``--sequence-alignment``, or ``neighbor2neighbor-stack``) against the
  single-frame model of the same size and budget (``recorrupted`` at its best strength on this sequence, or
  ``neighbor2neighbor``, on the same frames; ``SEQUENCE_SCHEMES``), the plain K-frame average and per-frame BM3D (its noise level
  tuned on the clean frames); PSNR on whole frames and on the moving pixels; crack contrast retention (the
  compare's measure, :func:`grainwright.inference.evaluation.detail.contrast_retention`, against the clean
  frame's contrast), median over the cracks and frames on the lane and over those of the still scene;
- the generated cast volume (:func:`~grainwright.inference.synthetic.stack_scenario.cast_volume`): the K-frame
  model (``recorrupted-stack`` at its default strength, its recorruption drawn with the slices' measured noise
  correlation) against per-slice BM3D, 3-D total variation (scikit-image ``denoise_tv_chambolle``) and 3-D non-local
  means (scikit-image ``denoise_nl_means``), each tuned on the clean volume over a small grid.

PSNR after Gonzalez and Woods; peak 4095 (12-bit data), outputs rounded to the data's integers as written.
"""
from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from functools import partial
from pathlib import Path
from typing import Any, Callable

import numpy as np

from grainwright.benchmarks.runtime import _LAUNCHER
from grainwright.inference.common.atomic import write_json_atomic
from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images.alignment import ALIGN_REVISIONS, ALIGNMENTS
from grainwright.inference.images.normalization import Normalization
from grainwright.inference.images.stacks import StackInfo, write_stack
from grainwright.inference.runtime.runner import OnnxDenoiser
from grainwright.inference.evaluation.stack_compare import frame_average
from grainwright.inference.runtime.stack_window import denoise_stack_array
from grainwright.inference.synthetic.scenario import FULL_SCALE
from grainwright.inference.synthetic.stack_scenario import (
    cast_volume,
    conveyor_sequence,
    sequence_info,
    volume_info,
    write_stack_pair,
)

TWELVE_BIT = Normalization("uint16", 12, 0.0, float(FULL_SCALE), 1)


def psnr(clean: np.ndarray, estimate: np.ndarray, mask: np.ndarray | None = None) -> float:
    """PSNR in dB against ``clean`` (peak 4095), over ``mask`` when given (broadcast over frames)."""
    error = (np.asarray(estimate, np.float64) - np.asarray(clean, np.float64)) ** 2
    if mask is not None:
        error = error[np.broadcast_to(mask, error.shape)]
    return float(10 * np.log10(FULL_SCALE**2 / np.mean(error)))


def _as_written(values: np.ndarray) -> np.ndarray:
    return np.clip(np.rint(values), 0, FULL_SCALE)


# ------------------------------------------------------------------------------------------------------ runtime


def export_random(name: str, hyper: dict[str, Any], path: Path, seed: int = 0, align: str = "none") -> Path:
    """A randomly initialised registered architecture exported to ONNX (12-bit normalisation); ``align`` is the
    neighbour alignment a multi-frame model's file records (as if trained so)."""
    from grainwright.models.checkpoint import new_checkpoint, save_checkpoint
    from grainwright.models.export import export_checkpoint

    summary = {"align_neighbours": align, "align_revision": ALIGN_REVISIONS[align]} if align != "none" else None
    payload = new_checkpoint(name, 1, TWELVE_BIT, hyper=hyper, seed=seed, training_summary=summary)
    export_checkpoint(save_checkpoint(path.with_suffix(".pt"), payload), path, threads=1, overwrite=True)
    return path


def moving_band_stack(frames: int, size: int, speed: int = 3, seed: int = 0) -> np.ndarray:
    """``(frames, size, size, 1)`` float32: noise around 2,000 whose middle third of the rows moves ``speed``
    pixels per frame to the right over a still rest, fresh noise added to every frame (so that an alignment finds
    motion and does all its work; pure noise lets the shift search stop at zero motion)."""
    rng = np.random.default_rng(seed)
    scene = rng.normal(2000, 100, (size, size + speed * frames)).astype(np.float32)
    band = slice(size // 3, 2 * size // 3)
    stack = np.repeat(scene[None, :, :size], frames, axis=0)
    for index in range(frames):
        start = speed * (frames - index)
        stack[index, band] = scene[band, start:start + size]
    return (stack + rng.normal(0, 30, stack.shape).astype(np.float32))[..., None]


def runtime_figures(stack_model: Path, single_model: Path, *, size: int, frames: int, threads: int,
                    repeats: int, aligned_models: dict[str, Path] | None = None) -> dict[str, Any]:
    """Seconds per megapixel per output frame of the models on the same generated stack
    (:func:`moving_band_stack`), interleaved: ``ratio`` = K-frame over single-frame model; for each alignment in
    ``aligned_models`` (the K-frame model's file recording it), ``aligned_ratio`` = that model over the same model
    without alignment and ``aligned_over_single`` = over the single-frame model (the issue's target)."""
    stack = moving_band_stack(frames, size)
    stacked, single = OnnxDenoiser(stack_model, threads=threads), OnnxDenoiser(single_model, threads=threads)
    runs: dict[str, Callable[[], Any]] = {
        "stack": lambda: denoise_stack_array(stacked, stack),
        "single": lambda: [single.run(frame, as_float=True) for frame in stack],
    }
    for alignment, path in (aligned_models or {}).items():
        runs[f"stack {alignment}"] = partial(denoise_stack_array, OnnxDenoiser(path, threads=threads), stack)
    seconds: dict[str, list[float]] = {name: [] for name in runs}
    for _ in range(repeats):
        for name, action in runs.items():
            start = time.perf_counter()
            action()
            seconds[name].append(time.perf_counter() - start)
    megapixels = frames * size * size / 1e6
    rates = {name: statistics.median(values) / megapixels for name, values in seconds.items()}
    figures = {"seconds_per_megapixel_per_frame": rates, "ratio": rates["stack"] / rates["single"],
               "size": size, "frames": frames, "threads": threads, "repeats": repeats}
    if aligned_models:
        figures["aligned_ratio"] = {name: rates[f"stack {name}"] / rates["stack"] for name in aligned_models}
        figures["aligned_over_single"] = {name: rates[f"stack {name}"] / rates["single"] for name in aligned_models}
    return figures


def _volume_file(path: Path, slices: int, edge: int) -> Path:
    info = StackInfo(slices, edge, edge, 1, np.dtype(np.uint16), axis="Z", flavour="imagej", spacing={"Z": 0.1},
                     units={"Z": "mm"})
    rng = np.random.default_rng(slices)
    write_stack(path, (rng.normal(2000, 100, (edge, edge, 1)).astype(np.uint16) for _ in range(slices)), info,
                overwrite=True)
    return path


def peak_rss(denoise_command: list[str], model: Path, slices: int, edge: int, threads: int,
             folder: Path) -> dict[str, Any]:
    """Peak RSS (MiB) of ``grainwright denoise`` (``denoise_command``) in a fresh process on a generated
    ``slices``-slice volume."""
    source = _volume_file(folder / f"volume-{slices}.tif", slices, edge)
    command = [*denoise_command, str(model), str(source), "-o",
               str(folder / "out"), "--threads", str(threads), "-q", "--overwrite", "--fixed-pattern", "never"]
    start = time.perf_counter()
    launched = subprocess.run([sys.executable, "-c", _LAUNCHER, *command], capture_output=True, text=True)
    if launched.returncode != 0:
        raise ConfigError(f"denoise on the generated {slices}-slice volume failed: {launched.stderr.strip()[-400:]}")
    source.unlink()
    (folder / "out" / source.name).unlink()
    return {"slices": slices, "edge": edge, "peak_rss_mib": int(launched.stdout.split()[-1]) / 1024,
            "seconds": time.perf_counter() - start}


# ------------------------------------------------------------------------------------------------------ quality


def train_and_export(data: Path, out: Path, *, model: str, hyper: dict[str, Any], scheme: str, minutes: float,
                     seed: int, threads: int, trained: dict[str, Any] | None = None, steps: int = 0,
                     extra: tuple[str, ...] = ()) -> Path:
    """Train on ``data`` for ``minutes`` (or ``steps`` optimiser steps when positive; noisy frames only) and export
    the best state to ONNX; the steps and minutes done are added to ``trained`` under the model's name.
    ``extra`` are further config assignments (``KEY=VALUE``)."""
    from grainwright.models.export import export_checkpoint
    from grainwright.trainer.run import train_command

    settings = [f'model.name="{model}"', f"seed={seed}", f"threads={threads}", "logging.progress=false",
                "logging.tensorboard=false", "data.patch_size=64", "data.batch_size=16"]
    settings += [f"model.hyper.{key}={value}" for key, value in hyper.items()] + list(extra)
    budget = {"steps": steps} if steps > 0 else {"minutes": minutes}
    summary, run = train_command(None, str(data), scheme=scheme, out=str(out), assignments=settings,
                                 announce=lambda message: None, **budget)
    export_checkpoint(run.best, out / "model.onnx", threads=threads, overwrite=True)
    if trained is not None:
        trained[model] = {"steps": summary.get("steps"), "minutes": summary.get("minutes"),
                          "scheme": summary.get("scheme"), "stack_axis": summary.get("stack_axis"),
                          "stack_pairing": summary.get("stack_pairing"),
                          "recorrupted_alpha": summary.get("recorrupted_alpha"),
                          "align_neighbours": summary.get("align_neighbours"),
                          "frame_noise_correlation": summary.get("frame_noise_correlation"),
                          "frame_noise_correlations": summary.get("frame_noise_correlations"),
                          "fixed_pattern_corrected": summary.get("fixed_pattern_corrected")}
    return out / "model.onnx"


def _tuned(clean: np.ndarray, candidates: dict[str, Callable[[], np.ndarray]]) -> tuple[str, np.ndarray, float]:
    """The candidate with the best PSNR against ``clean`` (tuning on ground truth: an upper bound)."""
    best = None
    for label, make in candidates.items():
        estimate = _as_written(make())
        score = psnr(clean, estimate)
        if best is None or score > best[2]:
            best = (label, estimate, score)
    return best


def bm3d_frames(noisy: np.ndarray, clean: np.ndarray, sigmas: tuple[float, ...], tune_on: int) -> tuple[float, np.ndarray]:
    """Per-frame BM3D, its noise level (DN) tuned on frame ``tune_on`` against the clean frame."""
    from grainwright.inference.baselines.bm3d import bm3d

    def run(frame: np.ndarray, sigma: float) -> np.ndarray:
        return bm3d(frame.astype(np.float32)[..., None], sigma)[..., 0]

    scores = {sigma: psnr(clean[tune_on], _as_written(run(noisy[tune_on], sigma))) for sigma in sigmas}
    sigma = max(scores, key=scores.get)
    return sigma, np.stack([_as_written(run(frame, sigma)) for frame in noisy])


def crack_retention(sequence: Any, output: np.ndarray) -> dict[str, float | int]:
    """Median crack contrast retention of ``output`` over the cracks and frames of ``sequence``, on the lane
    (moving) and on the still scene: output contrast over the clean frame's (1 = kept, 0 = erased)."""
    from grainwright.inference.evaluation.detail import Region, contrast_retention

    figures: dict[str, float | int] = {}
    for label, moving in (("moving", True), ("still", False)):
        ratios = [contrast_retention(sequence.clean[crack["frame"]], output[crack["frame"]],
                                     Region(crack["name"], tuple(crack["feature"]), tuple(crack["background"])))
                  for crack in sequence.cracks if crack["moving"] == moving]
        figures[f"crack_retention_{label}"] = float(np.median(ratios)) if ratios else float("nan")
        figures[f"cracks_{label}"] = len(ratios)
    return figures


SEQUENCE_SCHEMES = {  # the schemes of the K-frame and the single-frame model, by family
    "recorrupted": ("recorrupted-stack", "recorrupted"),
    "neighbor2neighbor": ("neighbor2neighbor-stack", "neighbor2neighbor"),
}
# The single-frame comparator's settings, by family: `recorrupted` at its best strength measured at fixed steps on
# the conveyor sequence (alpha 0.5: 0.3 dB above its default 0.3 and 0.1 dB above 1.0; docs/benchmarks.md), so
# that the K-frame model (at its own default, 1.0) meets the best single-frame model found. `--set` overrides it.
SINGLE_FRAME_SETTINGS = {"recorrupted": ("recorrupted.alpha=0.5",), "neighbor2neighbor": ()}
# The K-frame model's settings, by family: `recorrupted-stack` with its neighbours aligned to the centre frame (the
# lane moves; by optical flow, at 3,000 steps on seed 0 it kept 0.83 of the lane cracks' contrast against 0.70
# unaligned and 0.78 for the single-frame model; by dominant shifts, at 10 minutes, 0.84 against 0.73 in the mean of
# 3 seeds; docs/benchmarks.md), by the bench's --sequence-alignment. `neighbor2neighbor-stack` was not measured
# with alignment and stays without.
SEQUENCE_STACK_SETTINGS = {"recorrupted": ("model.align_neighbours={alignment}",), "neighbor2neighbor": ()}


def sequence_quality(folder: Path, *, frames: int, minutes: float, seed: int, threads: int, width: int,
                     bm3d_frames_scored: int, log: Callable[[str], None], steps: int = 0,
                     shape: tuple[int, int] = (192, 256), settings: tuple[str, ...] = (),
                     family: str = "recorrupted", alignment: str = "dominant-shifts") -> dict[str, Any]:
    """The conveyor sequence of ``seed``: the K-frame and the single-frame model of one scheme ``family``
    (``SEQUENCE_SCHEMES``) trained on its noisy frames, the K-frame average and per-frame BM3D, scored on the
    clean frames. ``alignment``: the K-frame model's ``model.align_neighbours`` where its family aligns."""
    stack_scheme, single_scheme = SEQUENCE_SCHEMES[family]
    sequence = conveyor_sequence(height=shape[0], width=shape[1], seed=seed)
    data = folder / f"sequence-{seed}"
    write_stack_pair(data, "conveyor", sequence.noisy, sequence.clean, sequence_info(sequence))
    noisy, clean, moving = sequence.noisy.astype(np.float64), sequence.clean, sequence.moving
    average = frame_average(noisy[..., None], frames)[..., 0]
    rows: dict[str, np.ndarray] = {"noisy": noisy, f"{frames}-frame average": average}
    stack_hyper = {"frames": frames, "levels": 2, "width": width}
    trained: dict[str, Any] = {}
    budget = {"minutes": minutes, "steps": steps, "extra": settings}
    stack_settings = tuple(setting.format(alignment=json.dumps(alignment))
                           for setting in SEQUENCE_STACK_SETTINGS[family])
    stack_budget = dict(budget, extra=(*stack_settings, *settings))
    log(f"sequence seed {seed}: training the {frames}-frame model ({f'{steps} steps' if steps else f'{minutes} min'})")
    stack_model = train_and_export(data, folder / f"seq-stack-{seed}", model="unet-stack", hyper=stack_hyper,
                                   scheme=stack_scheme, seed=seed, threads=threads, trained=trained, **stack_budget)
    rows[f"unet-stack K={frames}"] = _as_written(denoise_stack_array(OnnxDenoiser(stack_model, threads=threads),
                                                                     sequence.noisy[..., None])[..., 0])
    log(f"sequence seed {seed}: training the single-frame model")
    single_budget = dict(budget, extra=(*SINGLE_FRAME_SETTINGS[family], *settings))
    single_model = train_and_export(data, folder / f"seq-single-{seed}", model="unet-small",
                                    hyper={"levels": 2, "width": width}, scheme=single_scheme, seed=seed,
                                    threads=threads, trained=trained, **single_budget)
    single = OnnxDenoiser(single_model, threads=threads)
    rows["unet-small (single frame)"] = np.stack([_as_written(single.run(frame[..., None], as_float=True)[..., 0])
                                                  for frame in sequence.noisy])
    table = {name: {"psnr_whole": psnr(clean, values), "psnr_moving": psnr(clean, values, moving),
                    **crack_retention(sequence, values)} for name, values in rows.items()}
    if bm3d_frames_scored:
        scored = np.linspace(0, len(noisy) - 1, bm3d_frames_scored).round().astype(int)
        sigma, bm3d_out = bm3d_frames(noisy[scored], clean[scored], (80.0, 120.0, 160.0, 200.0), tune_on=0)
        table[f"BM3D per frame (sigma {sigma:g} DN tuned on GT; {len(scored)} frames)"] = {
            "psnr_whole": psnr(clean[scored], bm3d_out), "psnr_moving": psnr(clean[scored], bm3d_out, moving),
            "same_frames_unet_stack": psnr(clean[scored], rows[f"unet-stack K={frames}"][scored])}
    return {"seed": seed, "motion": sequence.motion, "schemes": [stack_scheme, single_scheme], "trained": trained,
            "rows": table}


def volume_quality(folder: Path, *, frames: int, minutes: float, seed: int, threads: int, width: int,
                   log: Callable[[str], None], steps: int = 0, settings: tuple[str, ...] = ()) -> dict[str, Any]:
    from skimage.restoration import denoise_nl_means, denoise_tv_chambolle

    from grainwright.inference.baselines.bm3d import bm3d

    volume = cast_volume(seed=seed)
    data = folder / f"volume-{seed}"
    write_stack_pair(data, "casting", volume.noisy, volume.clean, volume_info(volume))
    noisy, clean = volume.noisy.astype(np.float64), volume.clean
    log(f"volume seed {seed}: training the {frames}-frame model ({f'{steps} steps' if steps else f'{minutes} min'})")
    trained: dict[str, Any] = {}
    model = train_and_export(data, folder / f"vol-stack-{seed}", model="unet-stack",
                             hyper={"frames": frames, "levels": 2, "width": width}, scheme="recorrupted-stack",
                             minutes=minutes, steps=steps, seed=seed, threads=threads, trained=trained,
                             extra=settings)  # recorruption drawn with the slices' measured noise correlation
    table = {"noisy": psnr(clean, noisy), f"unet-stack K={frames}": psnr(clean, _as_written(
        denoise_stack_array(OnnxDenoiser(model, threads=threads), volume.noisy[..., None])[..., 0]))}
    scaled = noisy / FULL_SCALE
    sigma = volume.noise["sigma_native"]
    log(f"volume seed {seed}: classical filters tuned on the clean volume")
    label, _, score = _tuned(clean, {f"weight {w:g}": (lambda w=w: denoise_tv_chambolle(scaled, weight=w) * FULL_SCALE)
                                     for w in (0.02, 0.04, 0.06, 0.09)})
    table[f"3-D TV ({label})"] = score
    label, _, score = _tuned(clean, {f"h {h:g} sigma": (lambda h=h: denoise_nl_means(
        scaled, patch_size=3, patch_distance=4, h=h * sigma / FULL_SCALE, sigma=sigma / FULL_SCALE, fast_mode=True)
        * FULL_SCALE) for h in (0.6, 0.8, 1.0)})
    table[f"3-D NLM ({label})"] = score
    label, _, score = _tuned(clean, {f"sigma {s:g} DN": (lambda s=s: np.stack([bm3d(
        z.astype(np.float32)[..., None], s)[..., 0] for z in noisy])) for s in (0.8 * sigma, sigma, 1.2 * sigma)})
    table[f"BM3D per slice ({label})"] = score
    return {"seed": seed, "pores": len(volume.pores), "noise": volume.noise, "trained": trained, "psnr": table}


# ----------------------------------------------------------------------------------------------------- command


def run_bench(args: argparse.Namespace, denoise_command: list[str]) -> int:
    """Run ``grainwright bench stacks``; ``denoise_command`` launches ``grainwright denoise`` in a fresh process
    (given by the command layer, which this layer does not import)."""
    figures: dict[str, Any] = {"arguments": {key: value for key, value in vars(args).items()
                                             if isinstance(value, (int, float, str, list, type(None)))}}

    def log(message: str) -> None:
        print(message, flush=True)

    with tempfile.TemporaryDirectory(prefix="grainwright-bench-stacks-") as scratch:
        folder = Path(scratch)
        if "runtime" in args.parts:
            levels = {"levels": 3, "width": args.width}
            stack_model = export_random("unet-stack", {"frames": args.frames, **levels}, folder / "stack.onnx")
            single_model = export_random("unet-small", levels, folder / "single.onnx")
            aligned_models = {alignment: export_random("unet-stack", {"frames": args.frames, **levels},
                                                       folder / f"aligned-{alignment}.onnx", align=alignment)
                              for alignment in ALIGNMENTS[1:]}
            figures["runtime"] = runtime_figures(stack_model, single_model, size=args.size, frames=args.runtime_frames,
                                                 threads=args.threads, repeats=args.repeat,
                                                 aligned_models=aligned_models)
            log(f"runtime: {json.dumps(figures['runtime'])}")
            if args.rss_slices:
                figures["peak_rss"] = [peak_rss(denoise_command, stack_model, slices, args.rss_edge, args.threads,
                                                folder)
                                       for slices in args.rss_slices]
                first, last = figures["peak_rss"][0], figures["peak_rss"][-1]
                figures["peak_rss_ratio"] = last["peak_rss_mib"] / first["peak_rss_mib"]
                log(f"peak RSS: {json.dumps(figures['peak_rss'])}; ratio {figures['peak_rss_ratio']:.3f}")
        if "sequence" in args.parts:
            figures["sequence"] = [sequence_quality(folder, frames=args.frames, minutes=args.minutes, seed=seed,
                                                    threads=args.threads, width=args.width,
                                                    bm3d_frames_scored=args.bm3d_frames, log=log, steps=args.steps,
                                                    shape=tuple(args.sequence_size), settings=tuple(args.set),
                                                    family=args.sequence_schemes,
                                                    alignment=args.sequence_alignment)
                                   for seed in args.seeds]
            log(f"sequence: {json.dumps(figures['sequence'], indent=1)}")
        if "volume" in args.parts:
            figures["volume"] = [volume_quality(folder, frames=args.frames, minutes=args.minutes, seed=seed,
                                                threads=args.threads, width=args.width, log=log, steps=args.steps,
                                                settings=tuple(args.set))
                                 for seed in args.seeds]
            log(f"volume: {json.dumps(figures['volume'], indent=1)}")
    if args.json:
        write_json_atomic(Path(args.json), figures, default=str)
    return 0
