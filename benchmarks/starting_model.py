"""``grainwright bench starting-model``: the shipped starting model alone, with no training on the scored images,
against classical filters tuned on ground truth, and its speed against the former default ``noisy-only`` model.

Quality: ``bench train``'s held-out images (``TEST_IMAGES``: camera, coins, moon; at most 512 pixels, float32,
noise unclipped) with additive white Gaussian noise of each ``--sigmas`` level (1/255 of the range; the noise
of ``bench train``'s Gaussian case scaled to each level, so sigma 25 is exactly that case's noisy images).
The starting model is exported for float data (``grainwright starting-model export``'s path) and run through the
torch-free runtime, with the noise level estimated per image (``noise_sigma="estimate"``, what ``denoise`` does)
and, for reference, given exactly. Opponent: per image, the best PSNR of TV, NLM, wavelet shrinkage and our
BM3D, each with its full parameter grid tuned on that image's ground truth (``bench train``'s opponent).

Speed: seconds per megapixel of ``denoise`` (file to file: read, tile, run, write) on one 2048 x 2048 16-bit
TIFF, for the starting model and the former default ``noisy-only`` model (``FORMER_DEFAULT``, ``unet-small`` 2 x 24,
the architecture ``configs/noisy-only.toml`` had before it took the starting model's own; weights do not change
its speed), alternated ``--repeats`` times in one run; the median is reported.
"""
from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

SIGMAS = (10.0, 25.0, 50.0)
# Targets of the starting-model issue: gap to the opponent allowed at each level (dB).
ALLOWED_GAP = {10.0: 0.2, 25.0: 0.1, 50.0: 0.2}
# The speed target's reference: the default noisy-only architecture when the starting-model issue was filed.
FORMER_DEFAULT = ("unet-small", {"levels": 2, "width": 24})
SPEED_EDGE = 2048


def noisy_images(sigma_255: float, seed: int) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """``{name: (clean, noisy)}`` for the held-out images at noise level ``sigma_255 / 255``, ``(H, W, 1)``."""
    from grainwright.benchmarks.training import TEST_IMAGES, sample_image
    from grainwright.inference.noise.models import noise_from_dict

    noise = noise_from_dict({"kind": "gaussian", "sigma": sigma_255 / 255.0})
    rng = np.random.default_rng([seed, len("gaussian"), 1])  # bench train's stream for its Gaussian case
    images = {}
    for name in TEST_IMAGES:
        clean = sample_image(name)[..., None]
        images[name] = (clean, noise.sample(clean, rng))
    return images


def opponent(images: dict[str, tuple[np.ndarray, np.ndarray]], sigma: float,
             bm3d_published: bool = False) -> dict[str, Any]:
    """PSNR of each classical filter tuned on each image's ground truth, and the per-image best; with
    ``bm3d_published``, BM3D runs at its published threshold (``bench train``'s short grid) instead of its grid."""
    from grainwright.benchmarks.training import SEARCH_BASELINES, SHORT_GRIDS
    from grainwright.inference.evaluation.calibration import tune_on_ground_truth

    table: dict[str, Any] = {}
    for method in SEARCH_BASELINES:
        started = time.process_time()
        table[method] = {"psnr": {}, "params": {}}
        grid = SHORT_GRIDS.get(method) if bm3d_published else None
        for name, (clean, noisy) in images.items():
            tuning = tune_on_ground_truth(method, noisy, clean, {"kind": "gaussian", "sigma": sigma}, peak=1.0,
                                          grid=grid)
            table[method]["psnr"][name] = float(tuning.score)
            table[method]["params"][name] = tuning.params
        table[method]["cpu_seconds"] = time.process_time() - started
        how = "at its published threshold" if grid else "tuned on ground truth"
        print(f"   {method} {how}: {np.mean(list(table[method]['psnr'].values())):.2f} dB", flush=True)
    table["best per image"] = {name: max(table[m]["psnr"][name] for m in SEARCH_BASELINES) for name in images}
    return table


def export_for_float(checkpoint: dict[str, Any], work: Path, threads: int) -> Path:
    """The starting model exported for float32 data in ``[0, 1]`` (what ``starting-model export`` writes for such
    samples)."""
    from grainwright.inference.images.imageio import write_image
    from grainwright.models.starting import export_starting_model

    samples = work / "samples"
    samples.mkdir(parents=True, exist_ok=True)
    write_image(samples / "sample.npy", np.random.default_rng(0).random((128, 128, 1)).astype(np.float32),
                overwrite=True)
    output = work / "starting.onnx"
    export_starting_model(samples, output, overwrite=True, threads=threads, payload=checkpoint)
    return output


def mean(row: dict[str, float]) -> float:
    return float(np.mean(list(row.values())))


def score(onnx_path: Path, images: dict[str, tuple[np.ndarray, np.ndarray]], sigma: float | str,
          threads: int) -> dict[str, float]:
    from grainwright.inference.evaluation.metrics import psnr
    from grainwright.inference.runtime.runner import OnnxDenoiser

    denoiser = OnnxDenoiser(onnx_path, threads=threads, noise_sigma=sigma)
    return {name: float(psnr(clean, denoiser.run(noisy, as_float=True), peak=1.0))
            for name, (clean, noisy) in images.items()}


def speed(checkpoint: dict[str, Any], work: Path, threads: int, repeats: int) -> dict[str, Any]:
    """Seconds per megapixel of file-to-file ``denoise`` on a 2048 x 2048 uint16 TIFF, both models alternated."""
    from grainwright.inference.images.imageio import write_image
    from grainwright.inference.runtime.batch import denoise_files
    from grainwright.inference.runtime.runner import OnnxDenoiser
    from grainwright.models.checkpoint import new_checkpoint, save_checkpoint
    from grainwright.models.export import export_checkpoint
    from grainwright.models.registry import hyper_defaults
    from grainwright.models.starting import normalization_for_samples, starting_checkpoint_for

    frame_dir = work / "frame"
    frame_dir.mkdir(exist_ok=True)
    clean = np.clip(np.add.outer(np.linspace(0.2, 0.8, SPEED_EDGE), np.linspace(0, 0.1, SPEED_EDGE)), 0, 1)
    noisy = clean + 0.05 * np.random.default_rng(1).standard_normal(clean.shape)
    write_image(frame_dir / "frame.tif", np.round(np.clip(noisy, 0, 1) * 65535).astype(np.uint16)[..., None],
                overwrite=True)
    # Both models exported for the frame's data (uint16).
    normalization, _ = normalization_for_samples(frame_dir)
    starting_path = work / "starting-uint16.onnx"
    save_checkpoint(work / "starting-uint16.pt", starting_checkpoint_for(normalization, payload=checkpoint))
    export_checkpoint(work / "starting-uint16.pt", starting_path, overwrite=True, threads=threads)
    name, hyper = FORMER_DEFAULT[0], {**hyper_defaults(FORMER_DEFAULT[0]), **FORMER_DEFAULT[1]}
    save_checkpoint(work / "noisy-only.pt", new_checkpoint(name, 1, normalization, hyper=hyper))
    default_path = work / "noisy-only.onnx"
    export_checkpoint(work / "noisy-only.pt", default_path, overwrite=True, threads=threads)
    models = {"starting model (unet-noisemap)": starting_path, f"former default noisy-only ({name})": default_path}
    times: dict[str, list[float]] = {label: [] for label in models}
    megapixels = SPEED_EDGE * SPEED_EDGE / 1e6
    for attempt in range(repeats + 1):
        for label, path in models.items():
            denoiser = OnnxDenoiser(path, threads=threads)
            out = work / f"out-{attempt}-{len(times[label])}"
            started = time.perf_counter()
            for result in denoise_files(denoiser, [frame_dir / "frame.tif"], out, overwrite=True):
                if result.status != "done":
                    raise RuntimeError(f"denoise {result.status}: {result.message}")
            if attempt:  # the first round warms up
                times[label].append((time.perf_counter() - started) / megapixels)
    medians = {label: statistics.median(values) for label, values in times.items()}
    first, second = list(medians)
    return {"seconds_per_megapixel": medians, "all": times, "ratio": medians[first] / medians[second],
            "threads": threads, "frame": f"{SPEED_EDGE}x{SPEED_EDGE} uint16 TIFF"}


def run_bench(args: argparse.Namespace) -> int:
    import os

    from grainwright.inference.common.atomic import write_json_atomic
    from grainwright.models.checkpoint import load_checkpoint
    from grainwright.models.starting import load_starting_model
    from grainwright.trainer.generated import machine_description

    saved = Path(args.json) if args.json else None
    results: dict[str, Any] = json.loads(saved.read_text()) if saved and saved.is_file() else {}
    checkpoint = load_checkpoint(args.checkpoint) if args.checkpoint else load_starting_model()
    results["model"] = {"checkpoint": args.checkpoint or "shipped starting model",
                        "steps": (checkpoint.get("training_summary") or {}).get("steps")}
    results.setdefault("machine", []).append({"when": time.strftime("%Y-%m-%dT%H:%M:%S%z"), **machine_description()})
    sigmas = [float(s) for s in args.sigmas.split(",") if s.strip()]
    with tempfile.TemporaryDirectory(prefix="grainwright-bench-starting-") as folder:
        work = Path(folder)
        onnx_path = export_for_float(checkpoint, work, args.threads)
        cases = results.setdefault("cases", {})
        for sigma_255 in sigmas:
            key = f"{sigma_255:g}"
            case = cases.setdefault(key, {})
            images = noisy_images(sigma_255, args.seed)
            print(f"sigma {key}/255:", flush=True)
            if "opponent" not in case or case.get("seed") != args.seed:
                case["opponent"] = opponent(images, sigma_255 / 255.0, args.bm3d_published)
                case["seed"] = args.seed
                case["bm3d"] = "published threshold 2.7 sigma" if args.bm3d_published else "tuned on ground truth"
            case["starting model, level estimated"] = score(onnx_path, images, "estimate", args.threads)
            case["starting model, level given"] = score(onnx_path, images, sigma_255 / 255.0, args.threads)
            best = case["opponent"]["best per image"]
            case["gap_db"] = mean(case["starting model, level estimated"]) - mean(best)
            case["allowed_gap_db"] = -ALLOWED_GAP.get(sigma_255, 0.2)
            print(f"   opponent {mean(best):.2f} dB; starting model {mean(case['starting model, level estimated']):.2f}"
                  f" dB (level given: {mean(case['starting model, level given']):.2f} dB); gap {case['gap_db']:+.2f} "
                  f"dB (target >= {case['allowed_gap_db']:+.1f})", flush=True)
            if saved:
                write_json_atomic(saved, results)
        if args.repeats:
            results["speed"] = speed(checkpoint, work, args.threads, args.repeats)
            for label, value in results["speed"]["seconds_per_megapixel"].items():
                print(f"denoise {label}: {value:.3f} s/MP", flush=True)
            print(f"ratio starting / default: {results['speed']['ratio']:.2f} (target <= 1)")
    results["load_average_end"] = list(os.getloadavg())
    if saved:
        write_json_atomic(saved, results)
    return 0
