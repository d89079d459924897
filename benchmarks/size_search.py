"""The recorded quality search: which model and training regime a fixed CPU budget buys, without ground truth.

Every trial trains on noisy images only (scikit-image sample images, ``TRAIN_IMAGES`` of
:mod:`grainwright.benchmarks.training`) with ``grainwright train``, is exported to ONNX and run through the torch-free
runtime on held-out images (``TEST_IMAGES``, centre crops of ``TEST_EDGE`` pixels) with a flip/rotation
self-ensemble of 1, 2, 4 and 8 members. The opponent is, per held-out image, the best of TV, NLM, wavelet
shrinkage and our BM3D (``grainwright.inference.baselines``), each tuned on that image's ground truth.

Budget. "10 minutes on 2 cores" is 1200 CPU-seconds. The machine this ran on was shared, so wall-clock minutes
would reward whoever ran at a quiet moment; each trial instead gets a number of optimiser steps worth
``cpu_seconds`` of CPU time, from a short probe of bare forward+backward+Adam steps of that model (CPU time
counts only this process's threads). Contention still inflates CPU time per step a little (shared caches), which
errs towards fewer steps. The CPU time the run really used is recorded beside every figure.

Search order (``--stages``, run in the order given). Stage ``architecture`` compares models at a fixed patch
regime; stage ``regime`` varies patch size, batch size and learning rate around the best architecture (by mean
PSNR without ensemble; the best of each stage and case is then also scored with 2, 4 and 8 members); stage
``noise`` runs the Poisson-Gaussian (Anscombe domain versus a noise-map model) and speckle cases with the best
Gaussian configuration so far; stage ``larger`` tries larger U-Nets (worth it once bfloat16 steps made each
step cheaper); stage ``long`` retrains that configuration with a larger budget.
Results are written after every trial, so a stopped search resumes where it left off.
"""
from __future__ import annotations

import argparse
import copy
import json
import shutil
import time
from pathlib import Path
from typing import Any

import numpy as np

from grainwright.benchmarks.training import (
    ENSEMBLES,
    SEARCH_BASELINES,
    ensemble_scores,
    opponent,
    runtime_denoiser,
)
from grainwright.inference.common.atomic import write_json_atomic
from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images.crops import centre_box

TEST_EDGE = 256
BUDGET_CPU_SECONDS = 1200.0  # 10 minutes on 2 cores
PROBE_STEPS = 4  # timed steps of the CPU-time probe

# Trials as plain data: architecture and hyper-parameters, patch regime, and any other config keys (``--set``).
BASE = {"case": "gaussian", "scheme": "recorrupted", "model": "residual", "hyper": {"depth": 10, "width": 48},
        "patch_size": 48, "batch_size": 16, "set": {}}
ARCHITECTURES: dict[str, dict[str, Any]] = {
    "residual 8x32": {"hyper": {"depth": 8, "width": 32}},
    "residual 10x48": {},
    "residual 6x24": {"hyper": {"depth": 6, "width": 24}},
    "unet-small 2 levels x24": {"model": "unet-small", "hyper": {"levels": 2, "width": 24}},
    "unet-small 3 levels x16": {"model": "unet-small", "hyper": {"levels": 3, "width": 16}},
}
# Larger U-Nets, once bfloat16 steps (AMX) made each step 2-3 times cheaper; the first entry is the control.
LARGER: dict[str, dict[str, Any]] = {
    "unet-small 2 levels x24, bfloat16 steps": {"model": "unet-small", "hyper": {"levels": 2, "width": 24}},
    "unet-small 3 levels x24": {"model": "unet-small", "hyper": {"levels": 3, "width": 24}},
}
REGIMES: dict[str, dict[str, Any]] = {
    "patch 64, batch 8": {"patch_size": 64, "batch_size": 8},
    "patch 32, batch 32": {"patch_size": 32, "batch_size": 32},
    "lr 2e-3": {"set": {"optim.lr": 2e-3}},
}


def trial(name: str, **changes: Any) -> dict[str, Any]:
    """A trial: ``BASE`` with ``changes`` (``hyper`` and ``set`` replace, other keys override)."""
    spec = copy.deepcopy(BASE)
    spec.update(copy.deepcopy(changes))
    spec["name"] = name
    return spec


def architecture_trials() -> list[dict[str, Any]]:
    return [trial(name, **changes) for name, changes in ARCHITECTURES.items()]


def larger_trials() -> list[dict[str, Any]]:
    return [trial(name, **changes) for name, changes in LARGER.items()]


def regime_trials(best: dict[str, Any]) -> list[dict[str, Any]]:
    base = {key: best[key] for key in ("model", "hyper", "patch_size", "batch_size", "set")}
    return [trial(f"{best['name']}, {name}", **{**base, **changes}) for name, changes in REGIMES.items()]


def noise_trials(best: dict[str, Any]) -> list[dict[str, Any]]:
    """Poisson-Gaussian: Anscombe domain against a noise-map model, both with the best ``residual`` size (the
    noise-map model is a residual stack); speckle: neighbor2neighbor with the best Gaussian configuration."""
    size = f"{best['hyper']['depth']}x{best['hyper']['width']}"
    regime = {"patch_size": best["patch_size"], "batch_size": best["batch_size"], "set": dict(best["set"])}
    residual = {**regime, "hyper": best["hyper"]}
    return [
        trial(f"Poisson-Gaussian: recorrupted, Anscombe domain, residual {size}", case="poisson-gaussian",
              model="residual", **residual),
        trial(f"Poisson-Gaussian: neighbor2neighbor, noise-map model, linear domain, residual {size}",
              case="poisson-gaussian", scheme="neighbor2neighbor", model="residual-noisemap",
              **{**residual, "set": {**regime["set"], "data.transform": "none"}}),
        trial("speckle: neighbor2neighbor, linear domain, residual " + size, case="speckle",
              scheme="neighbor2neighbor", model="residual", **residual),
    ]


# -- pieces ---------------------------------------------------------------------------------------------------


def cpu_seconds_per_step(spec: dict[str, Any], threads: int) -> tuple[float, bool, str]:
    """CPU seconds of one bare forward+backward+Adam step of the trial's model on random patches (median of
    ``PROBE_STEPS`` after one warm-up step), in the tensor layout and precision the trainer would pick
    (:func:`grainwright.trainer.loop.fastest_step`); returns the seconds, the layout and the precision."""
    import torch

    from grainwright.models.registry import build_model, hyper_defaults
    from grainwright.trainer.loop import fastest_step, step_precision
    from grainwright.trainer.schemes.base import apply_model
    from grainwright.trainer.schemes.registry import scheme_class

    torch.set_num_threads(threads)
    hyper = {**hyper_defaults(spec["model"]), **spec["hyper"]}
    model = build_model(spec["model"], 1, **hyper)
    passes = scheme_class(spec["scheme"]).forward_passes_per_pixel / 3.0  # relative to forward + backward
    size = spec["patch_size"]
    (channels_last, precision), _ = fastest_step(model, 1, size, spec["batch_size"])
    batch = torch.rand(spec["batch_size"], 1, size, size)
    level = torch.full((spec["batch_size"], 1, size, size), 0.1)
    if channels_last:
        model.to(memory_format=torch.channels_last)
        batch = batch.contiguous(memory_format=torch.channels_last)
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-4)
    times = []
    for index in range(PROBE_STEPS + 1):
        start = time.process_time()
        optimizer.zero_grad(set_to_none=True)
        with step_precision(precision):
            output = apply_model(model, batch, level)
        torch.mean((output - batch) ** 2).backward()
        optimizer.step()
        if index:
            times.append(time.process_time() - start)
    return float(np.median(times)) * passes, channels_last, precision


def held_out(made: dict[str, Any]) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Centre crops (``TEST_EDGE`` pixels) of the held-out clean and noisy images, ``(H, W, 1)`` float32."""
    out = {}
    for name, clean in made["clean"].items():
        crop = centre_box(*clean.shape[:2], TEST_EDGE)
        out[name] = (clean[crop][..., None].copy(), made["noisy"][name][crop][..., None].copy())
    return out


def run_trial(spec: dict[str, Any], folder: Path, work: Path, images: dict[str, Any], cpu_seconds: float,
              threads: int, seed: int, steps: int | None = None) -> dict[str, Any]:
    """Train one trial for ``cpu_seconds`` worth of steps (or exactly ``steps``), export it, evaluate it;
    returns its record."""
    from grainwright.models.export import export_checkpoint
    from grainwright.trainer.run import train_command

    per_step, channels_last, precision = cpu_seconds_per_step(spec, threads)
    steps = steps or max(20, int(cpu_seconds / per_step))
    settings = [f"model.name=\"{spec['model']}\"", f"model.channels_last={json.dumps(channels_last)}",
                f"model.precision=\"{precision}\"", f"data.patch_size={spec['patch_size']}",
                f"data.batch_size={spec['batch_size']}", f"threads={threads}", f"seed={seed}",
                f"validation.every_steps={max(10, steps // 8)}", "validation.patches=32", "validation.patience=0",
                "logging.progress=false", "logging.tensorboard=false", "checkpoint.every_minutes=5"]
    settings += [f"model.hyper.{key}={json.dumps(value)}" for key, value in spec["hyper"].items()]
    settings += [f"{key}={json.dumps(value)}" for key, value in spec["set"].items()]
    slug = "".join(c if c.isalnum() else "-" for c in spec["name"]).strip("-")
    out = work / "runs" / slug
    shutil.rmtree(out, ignore_errors=True)
    started, wall = time.process_time(), time.perf_counter()
    summary, _ = train_command(None, str(folder), scheme=spec["scheme"], steps=steps, out=str(out),
                               assignments=settings, announce=lambda text: print(f"    {text}", flush=True))
    used, wall = time.process_time() - started, time.perf_counter() - wall
    onnx_path = out / "model.onnx"
    export_checkpoint(out, onnx_path, overwrite=True, threads=threads)
    scores = ensemble_scores(runtime_denoiser(onnx_path, threads), images, ensembles=(1,))
    return {"spec": spec, "onnx": str(onnx_path), "steps": steps, "probe_cpu_seconds_per_step": per_step,
            "channels_last": channels_last, "precision": precision,
            "train_cpu_seconds": used,
            "train_wall_seconds": wall, "macs_per_pixel": summary["macs_per_pixel"],
            "parameters": summary["parameters"], "transform": summary.get("transform"), **scores}


# -- the search -----------------------------------------------------------------------------------------------


def _save(path: Path, results: dict[str, Any]) -> None:
    write_json_atomic(path, results, default=float, indent=1)


def _best(results: dict[str, Any], names: list[str]) -> str:
    """The name of the trial with the highest mean PSNR without ensemble among ``names``."""
    done = [name for name in names if name in results["trials"]]
    return max(done, key=lambda name: results["trials"][name]["mean"]["1"])


def _winner(results: dict[str, Any]) -> dict[str, Any]:
    """The spec of the best Gaussian trial outside the long runs."""
    gaussian = [key for key, record in results["trials"].items()
                if record["spec"]["case"] == "gaussian" and record["stage"] != "long"]
    return results["trials"][_best(results, gaussian)]["spec"]


def _stage_plan(stage: str, results: dict[str, Any],
                args: argparse.Namespace) -> tuple[list[dict[str, Any]], float, str, int | None]:
    """A stage's trials (built on the results so far), CPU-seconds each, the suffix of their names and the fixed
    step count (None: by CPU time)."""
    trials = results["trials"]
    if stage == "architecture":
        return architecture_trials(), args.cpu_seconds, "", None
    if stage == "larger":
        return larger_trials(), args.cpu_seconds, "", None
    if stage == "regime":
        architecture = _best(results, [spec["name"] for spec in architecture_trials()])
        return regime_trials(trials[architecture]["spec"]), args.cpu_seconds, "", None
    if stage == "noise":
        residuals = [key for key, record in trials.items()
                     if record["spec"]["case"] == "gaussian" and record["spec"]["model"] == "residual"]
        return noise_trials(trials[_best(results, residuals)]["spec"]), args.cpu_seconds, "", None
    if stage == "long" and args.long_steps:
        return [_winner(results)], 0.0, f", {args.long_steps} steps", args.long_steps
    if stage == "long":
        return [_winner(results)], args.long_cpu_seconds, f", {args.long_cpu_seconds:.0f} CPU-s", None
    raise ConfigError(f"--stages: unknown stage '{stage}' (architecture, larger, regime, noise, long)")


def run_search(args: argparse.Namespace) -> int:
    """Run (or resume) the search; results go to ``args.json`` after every trial.

    Every trial is scored without ensemble; the best of each stage and case is then also scored with 2, 4 and
    8 ensemble members (the partial averages of one set of 8 passes).
    """
    from grainwright.benchmarks.training import make_folders

    work = Path(args.work)
    work.mkdir(parents=True, exist_ok=True)
    path = Path(args.json)
    results: dict[str, Any] = json.loads(path.read_text()) if path.is_file() else {}
    results.setdefault("trials", {})
    results.setdefault("opponents", {})
    results["settings"] = {"cpu_seconds": args.cpu_seconds, "long_cpu_seconds": args.long_cpu_seconds,
                           "threads": args.threads, "seed": args.seed, "test_edge": TEST_EDGE,
                           "budget_cpu_seconds": BUDGET_CPU_SECONDS}
    stages = [stage.strip() for stage in args.stages.split(",") if stage.strip()]
    cases: dict[str, Any] = {}

    def case_data(case: str) -> tuple[Path, dict[str, Any]]:
        if case not in cases:
            made = make_folders(work, case, args.seed)
            cases[case] = (made["root"] / "noisy-only", held_out(made))
            if case not in results["opponents"]:
                print(f"== opponents, {case}", flush=True)
                results["opponents"][case] = opponent(case, cases[case][1])
                _save(path, results)
        return cases[case]

    def run_stage(specs: list[dict[str, Any]], stage: str, cpu_seconds: float, suffix: str = "",
                  steps: int | None = None) -> list[str]:
        names = [spec["name"] + suffix for spec in specs]
        for spec, key in zip(specs, names):
            if key in results["trials"]:
                continue
            print(f"-- [{stage}] {key}", flush=True)
            folder, images = case_data(spec["case"])
            record = run_trial(spec, folder, work, images, cpu_seconds, args.threads, args.seed, steps)
            record["stage"] = stage
            results["trials"][key] = record
            _save(path, results)
            print(f"   {key}: {record['mean']['1']:.2f} dB; {record['steps']} steps, "
                  f"{record['train_cpu_seconds']:.0f} CPU-s", flush=True)
        for case in sorted({spec["case"] for spec in specs}):
            best = _best(results, [key for spec, key in zip(specs, names) if spec["case"] == case])
            record = results["trials"][best]
            if "8" not in record["mean"]:
                record.update(ensemble_scores(runtime_denoiser(Path(record["onnx"]), args.threads), case_data(case)[1]))
                _save(path, results)
                print(f"   ensembles of {best}: " + ", ".join(f"x{size} {record['mean'][str(size)]:.2f}"
                                                          for size in ENSEMBLES) + " dB", flush=True)
        return names

    for stage in stages:  # in the order given, each building on what is done so far
        specs, cpu_seconds, suffix, steps = _stage_plan(stage, results, args)
        run_stage(specs, stage, cpu_seconds, suffix, steps)
    results["winner"] = _winner(results)
    _save(path, results)
    print(render_markdown(results))
    return 0


def render_markdown(results: dict[str, Any]) -> str:
    """Every trial and its PSNR (dB, mean over the held-out images) with each ensemble size, and the opponents."""
    lines = []
    for case, table in results["opponents"].items():
        best = np.mean(list(table["best per image"]["psnr"].values()))
        parts = ", ".join(f"{m} {np.mean(list(table[m]['psnr'].values())):.2f}" for m in SEARCH_BASELINES)
        lines.append(f"- {case}: per-image best {best:.2f} dB ({parts}; each tuned on ground truth)")
    lines += ["", "| Stage | Trial | Case | MACs/px | Steps | Train CPU-s | x1 | x2 | x4 | x8 "
              "| vs best classical (largest x) |",
              "|---|---|---|---|---|---|---|---|---|---|---|"]
    for name, record in results["trials"].items():
        case = record["spec"]["case"]
        opponent_mean = np.mean(list(results["opponents"][case]["best per image"]["psnr"].values()))
        means = record["mean"]
        cells = [f"{means[str(size)]:.2f}" if str(size) in means else "" for size in ENSEMBLES]
        top = means[str(max(int(size) for size in means))]
        lines.append(f"| {record['stage']} | {name} | {case} | {record['macs_per_pixel']:.0f} | {record['steps']} | "
                     f"{record['train_cpu_seconds']:.0f} | " + " | ".join(cells) + f" | {top - opponent_mean:+.2f} |")
    return "\n".join(lines) + "\n"


def add_search_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--work", default="sweep-work", metavar="DIR", help="generated data and run folders")
    parser.add_argument("--json", default="sweep.json", metavar="FILE",
                        help="results file (read first: finished trials are skipped)")
    parser.add_argument("--stages", default="architecture,regime,noise,long", metavar="LIST",
                        help="comma-separated stages to run (architecture, larger, regime, noise, long)")
    parser.add_argument("--cpu-seconds", type=float, default=120.0, metavar="S",
                        help="CPU-seconds of training per trial (default 120; the full budget is 1200)")
    parser.add_argument("--long-cpu-seconds", type=float, default=600.0, metavar="S",
                        help="CPU-seconds for the winner's longer run (default 600)")
    parser.add_argument("--long-steps", type=int, default=0, metavar="N",
                        help="give the winner's longer run exactly N steps instead of --long-cpu-seconds")
    parser.add_argument("--threads", type=int, default=2, metavar="N", help="torch and ONNX Runtime threads")
    parser.add_argument("--seed", type=int, default=0)


def main() -> int:
    parser = argparse.ArgumentParser(description="recorded quality search")
    add_search_arguments(parser)
    return run_search(parser.parse_args())


if __name__ == "__main__":
    raise SystemExit(main())
