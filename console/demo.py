"""The demo pipeline: the whole job on the generated plant scenario (:mod:`grainwright.inference.synthetic.scenario`).

Steps, each through the same public functions the commands use:

1. generate the scenario (training frames, held-out frames with clean versions and ROIs, one large frame);
2. inspect the training frames: noise level, Poisson-Gaussian fit, banding flag; correct the row banding of
   every frame and save the noise description, as a user would with ``grainwright inspect --save-noise``;
3. train with the scheme ``auto`` picks from the data (single noisy frames: no clean image is used), starting
   from the shipped starting model as ``grainwright train`` does by default;
4. export the kept state to ONNX (the exporter checks ONNX Runtime against torch), and the starting model alone,
   with no training on these frames, for the same data;
5. for the record, train the same number of steps from random weights and export that too (optional);
6. denoise the large held-out frame tile by tile with the torch-free runtime and time it;
7. compare the learned models with every classical baseline on the held-out frames (``--quick``), with and
   without the clean frames, including the contrast retention on the cracks and pores.

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

DEFAULT_MINUTES = 3.0
DEFAULT_OUT = "grainwright-demo"
MARKER_FILE = "demo.json"
MARKER_KIND = "grainwright-demo"

# The learned rows of the report. Each one's ONNX file is ``ROLE.onnx``, so its label in the report is the role.
FINE_TUNED = "fine-tuned"
STARTING_ALONE = "starting-model-alone"
RANDOM_WEIGHTS = "random-weights"

# What a demo writes at the top of its folder; a re-run replaces exactly these and nothing else.
SCENARIO_DIR = "scenario"
CORRECTED_DIR = "corrected"
RUN_DIR = "training-run"
RANDOM_RUN_DIR = "training-run-random-weights"
DENOISED_DIR = "denoised"
REPORT_DIR = "report"
INSPECT_FILE = "inspection.json"
OLD_MODEL_FILE = "model.onnx"  # the single model of demos before the three learned rows; a re-run removes it
# A crack or pore enters the contrast-retention figure when its noisy contrast is at least this many standard
# errors (common practice, no source: below about 3 the ratio of two noisy contrasts is mostly noise).
MIN_REGION_SIGNIFICANCE = 3.0
# The comparison also scores every learned model with the runtime's 8-fold flip/rotation self-ensemble (`denoise
# --ensemble 8`), a row of its own: the best the model gives, at eight times its time, beside the plain row.
ENSEMBLE = 8
# The scored frames' copies in the training folder, and the share of the training patches they get
# (data.focus_frames, data.focus_share): in proportion to their size 3 frames among 27 would get a ninth of a
# 3-minute fine-tune's steps. All of them: the other frames give the noise fit and the held-out check. Measured on
# the demo's frames against shares 0, 0.33, 0.53 and 0.8 (docs/benchmarks.md, "The demo with its scored frames in
# focus").
SCORED_PREFIX = "scored-"
FOCUS_SHARE = 1.0
# Noisy sets of the scenario and their folders under corrected/.
CORRECTED_SETS = {scenario.TRAIN_DIR: "train", scenario.HOLDOUT_NOISY_DIR: "holdout", scenario.LARGE_NOISY_DIR: "large"}


def model_file(role: str) -> str:
    """The ONNX file of a learned row (its stem is the row's label in the report)."""
    return f"{role}.onnx"


DEMO_ENTRIES = (SCENARIO_DIR, CORRECTED_DIR, RUN_DIR, RANDOM_RUN_DIR, DENOISED_DIR, REPORT_DIR, INSPECT_FILE,
                OLD_MODEL_FILE, *(model_file(role) for role in (FINE_TUNED, STARTING_ALONE, RANDOM_WEIGHTS)))


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
        Extra training settings as ``key=value`` (the trainer's ``--set``), e.g. ``model.precision="float32"``.
    train_on_scored : bool
        Train on the held-out noisy frames too (their corrected noisy versions, never their clean ones), as a user
        trains on the frames they mean to denoise; a strip of every frame is held out for the trainer's checks
        (``data.validation_split = "regions"``), and the scored frames get ``FOCUS_SHARE`` of the training patches
        (``data.focus_frames``). False: the scored frames are frames the model never saw.
    random_weights_row : bool
        Also train the same number of steps from random weights (``start.weights = "random"``) and show it in
        the report beside the fine-tuned model and the starting model alone. Skipped when the main training
        already starts from random weights.
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
    train_on_scored: bool = True
    random_weights_row: bool = True
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
        ``out`` cannot be used, torch is missing, a training setting is wrong (checked before anything is
        written), or a step failed (its own message says which file and why).
    """
    settings = settings or DemoSettings()
    if settings.steps <= 0 and not settings.minutes > 0:
        raise ConfigError(f"--minutes must be a positive number of minutes, got {settings.minutes}")
    require_torch("demo")
    planned_start = check_training_settings(settings)["start"]["weights"]
    random_row = settings.random_weights_row and planned_start != "random"
    out = prepare_out_dir(out)
    started = time.perf_counter()
    summary: dict[str, Any] = {"kind": MARKER_KIND, "status": "running", "settings": asdict(settings)}
    write_json_atomic(out / MARKER_FILE, summary, default=_plain)  # marks the folder as a demo folder from the start
    steps = {"done": 0, "total": 7 if random_row else 6}

    def step(text: str, skipped: int = 0) -> None:  # skipped: planned steps found unnecessary on the way
        steps["done"], steps["total"] = steps["done"] + 1, steps["total"] - skipped
        echo(f"[{steps['done']}/{steps['total']} {time.perf_counter() - started:5.0f} s] {text}")

    step("generating the plant scenario (machined and cast parts, pores and hairline cracks, 12-bit frames)")
    manifest = scenario.write_scenario(
        out / SCENARIO_DIR, n_train=settings.train_frames, n_holdout=settings.holdout_frames,
        size=settings.frame_size, seed=settings.seed, large_size=tuple(settings.large_size),
    )
    summary["scenario"] = {"folder": str(out / SCENARIO_DIR), "sensor": manifest["sensor"]}

    step("inspecting the training frames; correcting the row banding of every frame")
    summary["inspection"] = inspect_and_correct(out, echo, settings.train_on_scored)

    main_role, learned = train_and_export(out, settings, echo, step, random_row)
    training = learned[main_role]
    summary["main_model"], summary["training"], summary["export"] = main_role, training, training["export"]
    summary["learned"] = learned

    step("denoising the large held-out frame tile by tile with the torch-free runtime")
    summary["large_frame"] = denoise_large_frame(out, settings, echo, main_role)

    step("comparing with every classical baseline on the held-out frames, with and without the clean frames")
    summary["compare"] = compare_methods(out, settings, echo, list(learned), main_role)
    for role, row in learned.items():
        row.update(summary["compare"]["learned"][role])

    summary["status"] = "finished"
    summary["seconds"] = round(time.perf_counter() - started, 1)
    write_json_atomic(out / MARKER_FILE, summary, default=_plain)
    for line in headline(summary, out):
        echo(line)
    return summary


# --------------------------------------------------------------------------------------------------------------
# Steps


def train_and_export(out: Path, settings: DemoSettings, echo: Callable[[str], Any], step: Callable[..., None],
                     random_row: bool) -> tuple[str, dict[str, dict]]:
    """Steps 3 to 5: train the demo's model and export it, export the starting model alone, and (``random_row``)
    train and export the same number of steps from random weights. Returns the demo model's role and every
    learned row's record by role, in the report's order."""
    step("training with the scheme 'auto' picks (single noisy frames only: no clean image is used)")
    training = train_model(out, settings, echo, RUN_DIR)
    # The demo's own model and its label: fine-tuned, unless the training started from random weights (asked
    # for, or the configured architecture is not the starting model's); then it is itself the record row.
    main_role = RANDOM_WEIGHTS if training["started_from"]["weights"] == "random" else FINE_TUNED
    planned, random_row = random_row, random_row and main_role != RANDOM_WEIGHTS

    step("exporting the trained model and the starting model alone to ONNX (ONNX Runtime checked against torch)",
         skipped=int(planned and not random_row))
    training["export"] = export_model(out, settings, echo, RUN_DIR, main_role)
    learned = {main_role: training, STARTING_ALONE: {"steps": 0, "kept_state": "the shipped starting model, no "
                                                     "training on these frames",
                                                     "export": export_starting_alone(out, settings, echo)}}
    if random_row:
        step(f"for the record: the same {training['steps']} steps from random weights")
        record = train_model(out, settings, echo, RANDOM_RUN_DIR, steps=training["steps"],
                             extra=['start.weights="random"'])
        record["export"] = export_model(out, settings, echo, RANDOM_RUN_DIR, RANDOM_WEIGHTS)
        learned[RANDOM_WEIGHTS] = record
    return main_role, learned


def _frames(folder: Path) -> list[Path]:
    from grainwright.inference.images.imageio import find_images

    return find_images([folder])


def inspect_and_correct(out: Path, echo: Callable[[str], Any], train_on_scored: bool) -> dict:
    """Inspect the noisy training frames (what ``grainwright inspect`` reports), correct the row banding of
    every noisy frame into ``corrected/``, inspect the corrected training frames, and save their noise model
    beside them as ``noise.toml`` (what ``grainwright inspect --save-noise`` writes). ``train_on_scored``: then
    copy the corrected held-out noisy frames into the training folder as ``scored-NAME``."""
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
    if train_on_scored:  # after the noise fit: it stays the training frames' own
        for path in _frames(target / "holdout"):
            shutil.copyfile(path, target / "train" / f"{SCORED_PREFIX}{path.name}")
        echo("  the held-out noisy frames join the training frames (never their clean versions) and get "
             f"{FOCUS_SHARE:.0%} of the training patches, as frames to be denoised do; a strip of every frame is held "
             "out for the trainer's checks")
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


def training_assignments(settings: DemoSettings, extra: list[str] = ()) -> list[str]:
    """The demo's ``--set`` assignments for ``grainwright train``: its own, then the user's, then ``extra`` (later
    ones win, so the record row's ``start.weights = "random"`` holds whatever the user set)."""
    # The frames were corrected in step 2, so the trainer's own fixed-pattern check has nothing left to do.
    scored = ['data.validation_split="regions"', f'data.focus_frames="{SCORED_PREFIX}*"',
              f"data.focus_share={FOCUS_SHARE}"] if settings.train_on_scored else []
    return [f"seed={settings.seed}", f"threads={settings.threads}", 'data.fixed_pattern="never"', *scored,
            f"logging.progress={'true' if settings.progress else 'false'}", *settings.train_settings, *extra]


def check_training_settings(settings: DemoSettings) -> dict:
    """The demo's training config, ``--set`` included, loaded and checked as ``grainwright train`` does, so that a
    wrong setting stops the demo with one line before anything is written."""
    from grainwright.trainer.config import load_config

    return load_config(settings.config, training_assignments(settings))


def train_model(out: Path, settings: DemoSettings, echo: Callable[[str], Any], run_dir: str, *,
                steps: int | None = None, extra: list[str] = ()) -> dict:
    """``grainwright train`` on the corrected training frames into ``out/run_dir``; ``steps`` overrides the demo's
    budget (the record row trains exactly as many steps as the demo's model). The result says where the weights
    started and which state the run kept (after a start from trained weights, the better of its start and its end
    on held-out frames)."""
    from grainwright.trainer.run import start_text, train_command

    steps = steps or settings.steps
    budget = {"steps": steps} if steps > 0 else {"minutes": settings.minutes}
    training, run = train_command(settings.config, str(out / CORRECTED_DIR / "train"),
                                  assignments=training_assignments(settings, list(extra)), out=str(out / run_dir),
                                  announce=lambda line: echo(f"  {line}"), **budget)
    keep = ("scheme", "steps", "minutes", "best_step", "best_validation", "stopped", "patches_per_second",
            "parameters", "transform", "layout", "precision", "started_from", "selection")
    selection = training.get("selection")
    kept = selection["kept"] if selection else f"trained (step {training['best_step']})"
    return {key: training.get(key) for key in keep} | {"run_folder": str(run.root), "kept_state": kept,
                                                         "start": start_text(training)}


def _worst_parity(result: Any) -> float:
    parity = result.metadata.get("parity", {})
    return max(entry["max_abs_diff"] for entry in (parity.get("random"), parity.get("calibration")) if entry)


def export_model(out: Path, settings: DemoSettings, echo: Callable[[str], Any], run_dir: str, role: str) -> dict:
    """Export the state a training run kept (its ``checkpoints/best.pt``) as ``ROLE.onnx``."""
    from grainwright.models.export import export_checkpoint

    result = export_checkpoint(out / run_dir, out / model_file(role), calibration=out / CORRECTED_DIR / "train",
                               threads=settings.threads or os.cpu_count() or 1, log=lambda line: echo(f"  {line}"))
    return {"model": str(result.path), "parity_max_abs_diff": _worst_parity(result)}


def export_starting_alone(out: Path, settings: DemoSettings, echo: Callable[[str], Any]) -> dict:
    """The shipped starting model for the corrected frames and their ``noise.toml``, with no training on them (what
    ``grainwright starting-model export`` writes)."""
    from grainwright.models.starting import export_starting_model, starting_model_manifest

    frames = out / CORRECTED_DIR / "train"
    result = export_starting_model(frames, out / model_file(STARTING_ALONE), noise_path=frames / "noise.toml",
                                   threads=settings.threads or os.cpu_count() or 1, log=lambda line: echo(f"  {line}"))
    manifest = starting_model_manifest()
    return {"model": str(result.path), "parity_max_abs_diff": _worst_parity(result),
            "starting_model_steps": manifest.get("total_steps", manifest["steps"]),  # over all its stages
            "starting_model_sha256": manifest["weights_sha256"]}


def denoise_large_frame(out: Path, settings: DemoSettings, echo: Callable[[str], Any], role: str) -> dict:
    """Denoise the large held-out frame with the demo's model ``ROLE.onnx``, tile by tile, and time it."""
    from grainwright.inference.evaluation.metrics import psnr
    from grainwright.inference.images.imageio import read_image, write_image
    from grainwright.inference.runtime.runner import OnnxDenoiser

    path = _frames(out / CORRECTED_DIR / "large")[0]
    clean = read_image(out / SCENARIO_DIR / scenario.LARGE_CLEAN_DIR / path.name)
    noisy = read_image(path)
    model = out / model_file(role)
    denoiser = OnnxDenoiser(model, threads=settings.threads or None, tile=settings.tile or None)
    denoiser.run(noisy[:64, :64])  # warm-up: the first call builds ONNX Runtime's kernels
    began = time.perf_counter()
    denoised = denoiser.run(noisy)
    seconds = time.perf_counter() - began
    megapixels = noisy.shape[0] * noisy.shape[1] / 1e6
    write_image(out / DENOISED_DIR / path.name, denoised, text=f"denoised by grainwright demo with {model.name}")
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


def _learned_row(method: str, truth: Any, blind: Any) -> dict:
    """One learned row's figures: PSNR and rank with the clean frames, rank by SURE without them, and the contrast
    retention on the cracks and pores (the same model output in both comparisons)."""
    with_truth = next(e for e in truth.ranking if e["method"] == method)
    without = next(e for e in blind.ranking if e["method"] == method)
    return {
        "psnr_db": with_truth["psnr"],
        "psnr_rank": with_truth["rank"],
        "sure_psnr_db": without["sure_psnr"],
        "sure_rank_without_ground_truth": without["rank"],
        "crack_contrast_retention": _region_mean(truth.regions, method, "crack")[0],
        "pore_contrast_retention": _region_mean(truth.regions, method, "pore")[0],
        "seconds_per_megapixel": without["seconds_per_megapixel"],
    }


def compare_methods(out: Path, settings: DemoSettings, echo: Callable[[str], Any], roles: list[str],
                    main_role: str) -> dict:
    """``grainwright compare --quick`` of the learned models (``ROLE.onnx`` for each of ``roles``) against all
    classical baselines, twice: with the clean frames (PSNR; classical parameters tuned on ground truth) and
    without (SURE ranking; J-invariant calibration). The top-level figures are the demo's own model's."""
    from grainwright.inference.evaluation.compare import CompareOptions, run_comparison

    options = CompareOptions(quick=True, threads=settings.threads or None, seed=settings.seed, ensemble_rows=ENSEMBLE)
    methods = [str(out / model_file(role)) for role in roles] + ["all-classical"]
    noisy = out / CORRECTED_DIR / "holdout"
    rois = out / SCENARIO_DIR / scenario.ROIS_FILE
    results = {}
    for name, clean in (("with-ground-truth", out / SCENARIO_DIR / scenario.HOLDOUT_CLEAN_DIR),
                        ("without-ground-truth", None)):
        echo(f"  {name.replace('-', ' ')}:")
        results[name] = run_comparison(noisy, methods, out / REPORT_DIR / name, clean_dir=clean, rois=rois,
                                       options=options, log=lambda line: echo(f"    {line}"))

    truth, blind = results["with-ground-truth"], results["without-ground-truth"]
    learned = next(e for e in truth.ranking if e["method"] == main_role)
    best_classical = next(e for e in truth.ranking if e["kind"] == "classical")
    blind_learned = next(e for e in blind.ranking if e["method"] == main_role)
    blind_classical = next(e for e in blind.ranking if e["kind"] == "classical")
    figures: dict[str, Any] = {
        "report_with_ground_truth": str(truth.report_dir / "index.html"),
        "report_without_ground_truth": str(blind.report_dir / "index.html"),
        "methods": len(truth.ranking),
        "psnr_learned_db": learned["psnr"],
        "best_classical": best_classical["method"],
        "psnr_best_classical_db": best_classical["psnr"],
        "psnr_gain_db": learned["psnr"] - best_classical["psnr"],
        "psnr_rank_best_classical": best_classical["rank"],
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
    figures["learned"] = {role: _learned_row(role, truth, blind) for role in roles}
    figures["ensemble"] = {"size": ENSEMBLE, "method": ensemble_label(main_role),
                           **_learned_row(ensemble_label(main_role), truth, blind)}
    # Every method's crack figure in both comparisons: classical parameters differ between the two.
    figures["crack_contrast_retention_by_method"] = {
        name: {entry["method"]: _region_mean(result.regions, entry["method"], "crack")[0] for entry in result.ranking}
        for name, result in results.items()
    }
    return figures


def ensemble_label(role: str) -> str:
    """The comparison's label of a learned row run with the self-ensemble."""
    return f"{role} x{ENSEMBLE}"


def _ratio(value: float | None) -> str:
    return "n/a" if value is None else f"{value:.2f}"


def learned_table(summary: dict) -> list[str]:
    """The learned rows beside the best classical method, with the clean frames (classical parameters tuned on
    them), plus each row's rank by SURE without them."""
    compare = summary["compare"]
    best = compare["best_classical"]
    classical = f"{best} (tuned on ground truth)"
    ensemble = compare["ensemble"]
    rows = list(summary["learned"].items())
    rows.insert(1, (ensemble["method"], {**ensemble, "steps": rows[0][1]["steps"]}))  # after the demo's own model
    width = max(len(classical), *(len(role) for role, _ in rows))
    crack_truth = compare["crack_contrast_retention_by_method"]["with-ground-truth"]
    lines = [f"    {'method':<{width}} {'steps':>7} {'PSNR dB':>8} {'rank':>5} {'rank by SURE':>13} "
             f"{'cracks kept':>12}"]
    for role, row in rows:
        lines.append(f"    {role:<{width}} {row['steps']:>7} {row['psnr_db']:>8.2f} {row['psnr_rank']:>5} "
                     f"{row['sure_rank_without_ground_truth']:>13} {_ratio(row['crack_contrast_retention']):>12}")
    lines.append(f"    {classical:<{width}} {'-':>7} {compare['psnr_best_classical_db']:>8.2f} "
                 f"{compare['psnr_rank_best_classical']:>5} {'-':>13} {_ratio(crack_truth.get(best)):>12}")
    return lines


def headline(summary: dict, out: Path) -> list[str]:
    """The closing lines: where the report is and the figures that matter."""
    compare, large = summary["compare"], summary["large_frame"]
    training, main = summary["training"], summary["main_model"]
    starting = summary["learned"][STARTING_ALONE]["export"]
    seen = ("  the scored frames' noisy versions were the training patches, as the frames a user denoises are (never "
            "their clean versions;\n  the other frames gave the noise fit and the held-out check; "
            "--scored-frames-unseen keeps them out)" if summary["settings"]["train_on_scored"]
            else "  the scored frames were never seen in training (--scored-frames-unseen)")
    lines = [
        "",
        f"grainwright demo finished in {summary['seconds'] / 60:.1f} min; everything is in {out}",
        f"  report (with ground truth):    {compare['report_with_ground_truth']}",
        f"  report (without ground truth): {compare['report_without_ground_truth']}",
        f"  model: {training['export']['model']} (trained {training['scheme']} on noisy frames only, "
        f"{training['steps']} steps in {training['minutes']:.1f} min; {training['start']})",
        seen,
        "",
        "  the learned models beside the best classical method on the scored frames (PSNR and rank with the clean",
        "  frames, classical parameters tuned on them; rank by SURE without them; cracks kept: contrast retention,",
        f"  1.00 = kept; steps on these frames, the starting model's own {starting['starting_model_steps']} steps on "
        "generated data apart):",
        *learned_table(summary),
        "",
        f"  PSNR gain of {main} over the best classical method: {compare['psnr_gain_db']:+.2f} dB "
        f"({compare['psnr_learned_db']:.2f} dB against {compare['best_classical']} at "
        f"{compare['psnr_best_classical_db']:.2f} dB tuned on ground truth; the scored frames)",
        f"  rank by SURE without ground truth: {compare['sure_rank_learned_without_ground_truth']} of "
        f"{compare['methods']} (rank by true PSNR: {compare['psnr_rank_learned']})",
        f"  with the {ENSEMBLE}-fold flip/rotation ensemble ({compare['ensemble']['method']}; denoise --ensemble "
        f"{ENSEMBLE}): {compare['ensemble']['psnr_db']:.2f} dB, rank {compare['ensemble']['psnr_rank']}, "
        f"{compare['ensemble']['seconds_per_megapixel']:.2f} s per megapixel in the comparison",
        f"  contrast retention on the cracks: {_ratio(compare['crack_contrast_retention_learned'])} "
        f"(best classical by SURE, {compare['best_classical_by_sure']}: "
        f"{_ratio(compare['crack_contrast_retention_best_classical'])}; 1.00 = contrast kept; "
        f"over the {compare['crack_regions_scored']} crack(s) whose noisy contrast is at least "
        f"{MIN_REGION_SIGNIFICANCE:g} standard errors), pores "
        f"{_ratio(compare['pore_contrast_retention_learned'])}",
        f"  seconds per megapixel: {large['seconds_per_megapixel']:.2f} on the large "
        f"{large['shape'][1]}x{large['shape'][0]} frame, tiled "
        f"({compare['seconds_per_megapixel_learned']:.2f} in the comparison; "
        f"{compare['best_classical_by_sure']} {compare['seconds_per_megapixel_best_classical']:.2f})",
        "",
        "  Caution: denoising can remove exactly the detail that matters (a crack, a pore). Use the output as a",
        "  viewing and screening aid, not as a substitute for the original frame or for qualified review.",
    ]
    return lines
