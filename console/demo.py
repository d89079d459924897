"""The demo pipeline: the whole job on the generated plant scenario (:mod:`grainwright.inference.synthetic.scenario`).

Steps, each through the same public functions the commands use:

1. generate the scenario (training frames, held-out frames with clean versions and ROIs, one large frame);
2. inspect the training frames: noise level, Poisson-Gaussian fit, banding flag; correct the row banding of
   every frame and save the noise description, as a user would with ``grainwright inspect --save-noise``;
3. train with the scheme ``auto`` picks from the data (single noisy frames: no clean image is used);
4. export the best checkpoint to ONNX (the exporter checks ONNX Runtime against torch);
5. denoise the large held-out frame tile by tile with the torch-free runtime and time it;
6. compare the model with every classical baseline on the held-out frames (``--quick``), with and without the
   clean frames, including the contrast retention on the cracks and pores.

This module is torch-free at import; training and export are imported inside :func:`run_demo` after
:func:`grainwright.console.torch_needed.require_torch`.
"""
from __future__ import annotations

import json
import os
import shutil
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from grainwright.console.torch_needed import require_torch
from grainwright.inference.common.atomic import write_json_atomic
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.synthetic import scenario

DEFAULT_MINUTES = 4.0
DEFAULT_OUT = "grainwright-demo"
MARKER_FILE = "demo.json"
MARKER_KIND = "grainwright-demo"

# What a demo writes at the top of its folder; a re-run replaces exactly these and nothing else.
SCENARIO_DIR = "scenario"
CORRECTED_DIR = "corrected"
RUN_DIR = "training-run"
MODEL_FILE = "model.onnx"
DENOISED_DIR = "denoised"
REPORT_DIR = "report"
INSPECT_FILE = "inspection.json"
# A crack or pore enters the contrast-retention figure when its noisy contrast is at least this many standard
# errors (common practice, no source: below about 3 the ratio of two noisy contrasts is mostly noise).
MIN_REGION_SIGNIFICANCE = 3.0
# Noisy sets of the scenario and their folders under corrected/.
CORRECTED_SETS = {scenario.TRAIN_DIR: "train", scenario.HOLDOUT_NOISY_DIR: "holdout", scenario.LARGE_NOISY_DIR: "large"}
DEMO_ENTRIES = (SCENARIO_DIR, CORRECTED_DIR, RUN_DIR, MODEL_FILE, DENOISED_DIR, REPORT_DIR, INSPECT_FILE)


@dataclass
class DemoSettings:
    """Sizes and budgets of one demo run.

    Parameters
    ----------
    minutes : float
        Training budget, wall-clock minutes (used when ``steps`` is 0).
    steps : int
        Training budget in optimiser steps instead of minutes (0 = use ``minutes``).
    seed : int
        Seed of the scenario and of training.
    train_frames, holdout_frames : int
        Number of generated training and held-out frames.
    frame_size : int
        Edge of the training and held-out frames, pixels.
    large_size : (int, int)
        Height and width of the large held-out frame denoised tile by tile, pixels.
    threads : int
        Threads for training and ONNX Runtime; 0 = all cores.
    config : str
        Training config: a shipped preset name or a TOML file. The default, ``fast-cpu``, is the small, quick
        preset; its scheme is ``auto``.
    train_settings : list of str
        Extra training settings as ``key=value`` (the trainer's ``--set``), e.g. a smaller model for a smoke test.
    tile : int
        Tile edge for the large frame (0 = the runtime's default).
    progress : bool
        Show progress bars.
    """

    minutes: float = DEFAULT_MINUTES
    steps: int = 0
    seed: int = 7
    train_frames: int = 24
    holdout_frames: int = 3
    frame_size: int = 256
    large_size: tuple[int, int] = (1024, 2048)
    threads: int = 0
    config: str = "fast-cpu"
    train_settings: list[str] = field(default_factory=list)
    tile: int = 0
    progress: bool = True


# --------------------------------------------------------------------------------------------------------------
# The output folder


def prepare_out_dir(out: str | Path) -> Path:
    """Make ``out`` ready for a demo: new, empty, or a previous demo folder whose demo entries are removed.

    Raises
    ------
    InputError
        ``out`` is a file, or a non-empty folder that a previous ``grainwright demo`` did not write.
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputError(out, "exists and is not a folder; give --out a new or empty folder")
    if out.is_dir() and any(out.iterdir()):
        marker = out / MARKER_FILE
        try:
            kind = json.loads(marker.read_text()).get("kind") if marker.is_file() else None
        except (OSError, ValueError, AttributeError):
            kind = None
        if kind != MARKER_KIND:
            raise InputError(
                out,
                f"folder is not empty and is not a previous demo folder (no {MARKER_FILE} written by "
                "'grainwright demo'); nothing was written. Give --out a new or empty folder",
            )
        for name in DEMO_ENTRIES:
            path = out / name
            if path.is_dir() and not path.is_symlink():
                shutil.rmtree(path)
            elif path.exists() or path.is_symlink():
                path.unlink()
    out.mkdir(parents=True, exist_ok=True)
    return out


def _plain(value: Any) -> Any:
    """JSON fallback for numpy scalars, arrays and paths."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"not JSON-serialisable: {type(value).__name__}")


# --------------------------------------------------------------------------------------------------------------
# The pipeline


def run_demo(out: str | Path, settings: DemoSettings | None = None, echo: Callable[[str], Any] = print) -> dict:
    """Run the whole demo into ``out`` and return its summary (also written to ``out/demo.json``).

    Raises
    ------
    GrainwrightError
        ``out`` cannot be used, torch is missing, or a step failed (its own message says which file and why).
    """
    settings = settings or DemoSettings()
    if settings.steps <= 0 and not settings.minutes > 0:
        raise ConfigError(f"--minutes must be a positive number of minutes, got {settings.minutes}")
    require_torch("demo")
    out = prepare_out_dir(out)
    started = time.perf_counter()
    summary: dict[str, Any] = {"kind": MARKER_KIND, "status": "running", "settings": asdict(settings)}
    write_json_atomic(out / MARKER_FILE, summary, default=_plain)  # marks the folder as a demo folder from the start

    def step(number: int, text: str) -> None:
        echo(f"[{number}/6 {time.perf_counter() - started:5.0f} s] {text}")

    step(1, "generating the plant scenario (machined and cast parts, pores and hairline cracks, 12-bit frames)")
    manifest = scenario.write_scenario(
        out / SCENARIO_DIR, n_train=settings.train_frames, n_holdout=settings.holdout_frames,
        size=settings.frame_size, seed=settings.seed, large_size=tuple(settings.large_size),
    )
    summary["scenario"] = {"folder": str(out / SCENARIO_DIR), "sensor": manifest["sensor"]}

    step(2, "inspecting the training frames; correcting the row banding of every frame")
    summary["inspection"] = inspect_and_correct(out, echo)

    step(3, "training with the scheme 'auto' picks (single noisy frames only: no clean image is used)")
    summary["training"] = train_model(out, settings, echo)

    step(4, "exporting the best checkpoint to ONNX (ONNX Runtime checked against torch)")
    summary["export"] = export_model(out, settings, echo)

    step(5, "denoising the large held-out frame tile by tile with the torch-free runtime")
    summary["large_frame"] = denoise_large_frame(out, settings, echo)

    step(6, "comparing with every classical baseline on the held-out frames, with and without the clean frames")
    summary["compare"] = compare_methods(out, settings, echo)

    summary["status"] = "finished"
    summary["seconds"] = round(time.perf_counter() - started, 1)
    write_json_atomic(out / MARKER_FILE, summary, default=_plain)
    for line in headline(summary, out):
        echo(line)
    return summary


# --------------------------------------------------------------------------------------------------------------
# Steps


def _frames(folder: Path) -> list[Path]:
    from grainwright.inference.images.imageio import find_images

    return find_images([folder])


def inspect_and_correct(out: Path, echo: Callable[[str], Any]) -> dict:
    """Inspect the noisy training frames (what ``grainwright inspect`` reports), correct the row banding of
    every noisy frame into ``corrected/``, inspect the corrected training frames, and save their noise model
    beside them as ``noise.toml`` (what ``grainwright inspect --save-noise`` writes)."""
    from grainwright.inference.images.imageio import read_image, write_image
    from grainwright.inference.noise.analysis import inspect_paths
    from grainwright.inference.noise.estimation import correct_fixed_pattern
    from grainwright.inference.noise.models import save_noise

    source, target = out / SCENARIO_DIR, out / CORRECTED_DIR
    before = inspect_paths([source / scenario.TRAIN_DIR])
    if not before.images:
        raise InputError(source / scenario.TRAIN_DIR, "no training frame could be inspected")
    frames = before.summary["images"]
    echo(f"  {frames} frames, {before.summary['bit_depths']} bit, noise {before.summary['noise_kind']} "
         f"({before.summary['median_sigma_percent']:.2f}% of the range); row/column banding flagged on "
         f"{before.summary['banding_images']} of {frames}")

    for folder, name in CORRECTED_SETS.items():
        for path in _frames(source / folder):
            image = read_image(path)
            write_image(target / name / path.name, correct_fixed_pattern(image), dtype=image.dtype,
                        text="grainwright demo: row/column banding corrected")
    after = inspect_paths([target / "train"])
    model = after.model
    save_noise(model, target / "train" / "noise.toml",
               header="written by grainwright demo from the corrected training frames (as inspect --save-noise)")
    full_scale = float(2**scenario.BIT_DEPTH - 1)
    fitted = model.to_dict()
    sensor = scenario.SensorModel()
    if fitted["kind"] == "poisson-gaussian":
        echo(f"  after the correction: banding flagged on {after.summary['banding_images']} of {frames}; fitted "
             f"Poisson-Gaussian noise: gain {fitted['gain'] * full_scale:.2f}, read {fitted['read'] * full_scale:.1f}"
             f" DN (the generator's sensor: {sensor.gain:g} and {sensor.read:g} DN); saved as noise.toml")
    else:
        echo(f"  after the correction: banding flagged on {after.summary['banding_images']} of {frames}; noise "
             f"model {model.describe()} saved as noise.toml")
    echo(f"  recommendation: {after.recommendation['scheme']} ({after.recommendation['why']})")
    inspection = {
        "frames": frames,
        "banding_flagged_before": before.summary["banding_images"],
        "banding_flagged_after": after.summary["banding_images"],
        "noise_model": fitted,
        "sensor": asdict(sensor),
        "recommended_scheme": after.recommendation["scheme"],
    }
    write_json_atomic(out / INSPECT_FILE, {"before_correction": before.to_dict(), "after_correction": after.to_dict()},
                      default=_plain)
    return inspection


def train_model(out: Path, settings: DemoSettings, echo: Callable[[str], Any]) -> dict:
    from grainwright.trainer.run import train_command

    # The frames were corrected in step 2, so the trainer's own fixed-pattern check has nothing left to do.
    assignments = [f"seed={settings.seed}", f"threads={settings.threads}", 'data.fixed_pattern="never"',
                   f"logging.progress={'true' if settings.progress else 'false'}", *settings.train_settings]
    budget = {"steps": settings.steps} if settings.steps > 0 else {"minutes": settings.minutes}
    training, run = train_command(settings.config, str(out / CORRECTED_DIR / "train"), assignments=assignments,
                                  out=str(out / RUN_DIR), announce=lambda line: echo(f"  {line}"), **budget)
    keep = ("scheme", "steps", "minutes", "best_step", "best_validation", "stopped", "patches_per_second",
            "parameters", "transform", "layout")
    return {key: training.get(key) for key in keep} | {"run_folder": str(run.root)}


def export_model(out: Path, settings: DemoSettings, echo: Callable[[str], Any]) -> dict:
    from grainwright.models.export import export_checkpoint

    result = export_checkpoint(out / RUN_DIR, out / MODEL_FILE, calibration=out / CORRECTED_DIR / "train",
                               threads=settings.threads or os.cpu_count() or 1, log=lambda line: echo(f"  {line}"))
    parity = result.metadata.get("parity", {})
    worst = max(entry["max_abs_diff"] for entry in (parity.get("random"), parity.get("calibration")) if entry)
    return {"model": str(result.path), "parity_max_abs_diff": worst}


def denoise_large_frame(out: Path, settings: DemoSettings, echo: Callable[[str], Any]) -> dict:
    from grainwright.inference.evaluation.metrics import psnr
    from grainwright.inference.images.imageio import read_image, write_image
    from grainwright.inference.runtime.runner import OnnxDenoiser

    path = _frames(out / CORRECTED_DIR / "large")[0]
    clean = read_image(out / SCENARIO_DIR / scenario.LARGE_CLEAN_DIR / path.name)
    noisy = read_image(path)
    denoiser = OnnxDenoiser(out / MODEL_FILE, threads=settings.threads or None, tile=settings.tile or None)
    denoiser.run(noisy[:64, :64])  # warm-up: the first call builds ONNX Runtime's kernels
    began = time.perf_counter()
    denoised = denoiser.run(noisy)
    seconds = time.perf_counter() - began
    megapixels = noisy.shape[0] * noisy.shape[1] / 1e6
    write_image(out / DENOISED_DIR / path.name, denoised, text=f"denoised by grainwright demo with {MODEL_FILE}")
    peak = float(2**scenario.BIT_DEPTH - 1)
    figures = {
        "file": str(out / DENOISED_DIR / path.name),
        "shape": list(noisy.shape),
        "tile": denoiser.tile,
        "seconds_per_megapixel": seconds / megapixels,
        "psnr_noisy_db": psnr(clean, noisy, peak),
        "psnr_denoised_db": psnr(clean, denoised, peak),
    }
    echo(f"  {noisy.shape[1]}x{noisy.shape[0]} frame in {seconds:.2f} s ({figures['seconds_per_megapixel']:.2f} s "
         f"per megapixel, tiles of {denoiser.tile} px); PSNR {figures['psnr_noisy_db']:.2f} dB noisy -> "
         f"{figures['psnr_denoised_db']:.2f} dB denoised")
    return figures


def _region_mean(regions: list[dict], method: str, kind: str) -> tuple[float | None, int]:
    """Mean contrast retention of ``method`` over the ``kind`` regions (cracks or pores) whose noisy contrast is
    at least ``MIN_REGION_SIGNIFICANCE`` standard errors: fainter ones give a ratio of two noisy numbers."""
    values = [r["contrast_retention"] for r in regions
              if r["method"] == method and r["region"].startswith(f"{kind}-")
              and r["noisy_contrast_in_standard_errors"] >= MIN_REGION_SIGNIFICANCE
              and np.isfinite(r["contrast_retention"])]
    return (float(np.mean(values)) if values else None), len(values)


def compare_methods(out: Path, settings: DemoSettings, echo: Callable[[str], Any]) -> dict:
    """``grainwright compare --quick`` of the model against all classical baselines, twice: with the clean
    frames (PSNR; classical parameters tuned on ground truth) and without (SURE ranking; J-invariant calibration)."""
    from grainwright.inference.evaluation.compare import CompareOptions, run_comparison

    options = CompareOptions(quick=True, threads=settings.threads or None, seed=settings.seed)
    methods = [str(out / MODEL_FILE), "all-classical"]
    noisy = out / CORRECTED_DIR / "holdout"
    rois = out / SCENARIO_DIR / scenario.ROIS_FILE
    results = {}
    for name, clean in (("with-ground-truth", out / SCENARIO_DIR / scenario.HOLDOUT_CLEAN_DIR),
                        ("without-ground-truth", None)):
        echo(f"  {name.replace('-', ' ')}:")
        results[name] = run_comparison(noisy, methods, out / REPORT_DIR / name, clean_dir=clean, rois=rois,
                                       options=options, log=lambda line: echo(f"    {line}"))

    truth, blind = results["with-ground-truth"], results["without-ground-truth"]
    learned = next(e for e in truth.ranking if e["kind"] == "learned")
    best_classical = next(e for e in truth.ranking if e["kind"] == "classical")
    blind_learned = next(e for e in blind.ranking if e["kind"] == "learned")
    blind_classical = next(e for e in blind.ranking if e["kind"] == "classical")
    figures: dict[str, Any] = {
        "report_with_ground_truth": str(truth.report_dir / "index.html"),
        "report_without_ground_truth": str(blind.report_dir / "index.html"),
        "methods": len(truth.ranking),
        "psnr_learned_db": learned["psnr"],
        "best_classical": best_classical["method"],
        "psnr_best_classical_db": best_classical["psnr"],
        "psnr_gain_db": learned["psnr"] - best_classical["psnr"],
        "psnr_rank_learned": learned["rank"],
        "sure_rank_learned_without_ground_truth": blind_learned["rank"],
        "sure_psnr_learned_db": blind_learned["sure_psnr"],
        "best_classical_by_sure": blind_classical["method"],
        "seconds_per_megapixel_learned": blind_learned["seconds_per_megapixel"],
        "seconds_per_megapixel_best_classical": blind_classical["seconds_per_megapixel"],
    }
    for kind in ("crack", "pore"):
        for label, method in (("learned", blind_learned["method"]), ("best_classical", blind_classical["method"])):
            mean, count = _region_mean(blind.regions, method, kind)
            figures[f"{kind}_contrast_retention_{label}"] = mean
            figures[f"{kind}_regions_scored"] = count
    return figures


def headline(summary: dict, out: Path) -> list[str]:
    """The closing lines: where the report is and the figures that matter."""
    compare, large = summary["compare"], summary["large_frame"]
    training = summary["training"]

    def ratio(value: float | None) -> str:
        return "n/a" if value is None else f"{value:.2f}"

    lines = [
        "",
        f"grainwright demo finished in {summary['seconds'] / 60:.1f} min; everything is in {out}",
        f"  report (with ground truth):    {compare['report_with_ground_truth']}",
        f"  report (without ground truth): {compare['report_without_ground_truth']}",
        f"  model: {summary['export']['model']} (trained {training['scheme']} on noisy frames only, "
        f"{training['steps']} steps in {training['minutes']:.1f} min)",
        "",
        f"  PSNR gain over the best classical method: {compare['psnr_gain_db']:+.2f} dB "
        f"({compare['psnr_learned_db']:.2f} dB against {compare['best_classical']} at "
        f"{compare['psnr_best_classical_db']:.2f} dB tuned on ground truth; held-out frames)",
        f"  rank by SURE without ground truth: {compare['sure_rank_learned_without_ground_truth']} of "
        f"{compare['methods']} (rank by true PSNR: {compare['psnr_rank_learned']})",
        f"  contrast retention on the cracks: {ratio(compare['crack_contrast_retention_learned'])} "
        f"(best classical by SURE, {compare['best_classical_by_sure']}: "
        f"{ratio(compare['crack_contrast_retention_best_classical'])}; 1.00 = contrast kept; "
        f"over the {compare['crack_regions_scored']} crack(s) whose noisy contrast is at least "
        f"{MIN_REGION_SIGNIFICANCE:g} standard errors), pores "
        f"{ratio(compare['pore_contrast_retention_learned'])}",
        f"  seconds per megapixel: {large['seconds_per_megapixel']:.2f} on the large "
        f"{large['shape'][1]}x{large['shape'][0]} frame, tiled "
        f"({compare['seconds_per_megapixel_learned']:.2f} in the comparison; "
        f"{compare['best_classical_by_sure']} {compare['seconds_per_megapixel_best_classical']:.2f})",
        "",
        "  Caution: denoising can remove exactly the detail that matters (a crack, a pore). Use the output as a",
        "  viewing and screening aid, not as a substitute for the original frame or for qualified review.",
    ]
    return lines
