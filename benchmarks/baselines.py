"""The benchmark behind ``grainwright bench baselines``: PSNR and seconds per megapixel of every classical
baseline, in one run.

On crops of scikit-image's bundled sample images with Gaussian noise added (seeded), each baseline runs with its
sigma-derived defaults (timed) and with parameters tuned on ground truth by its small grid search (labelled so:
a user without clean images cannot reproduce those figures). Timings on a shared machine are noisy; compare
the ratios of CPU time, which come from runs side by side in one process. Each filter runs once per image.
"""
from __future__ import annotations

import argparse
import os
import platform
import time
from typing import Any

import numpy as np

from grainwright.inference.baselines.registry import BASELINES, denoise, get_baseline
from grainwright.inference.common.atomic import write_json_atomic
from grainwright.inference.common.errors import ConfigError
from grainwright.inference.evaluation.calibration import (
    GROUND_TRUTH_LABEL,
    tune_on_ground_truth,
)
from grainwright.inference.evaluation.metrics import psnr
from grainwright.inference.images.crops import centre_crop

SAMPLE_IMAGES = ("camera", "astronaut", "coins", "moon", "brick", "grass", "gravel")
# Reference for the time ratios: scikit-image's non-local means, the usual yardstick for BM3D.
REFERENCE_METHOD = "nlm"
HARD_STAGE_ROW = "bm3d (hard-threshold stage only)"


def _sample(name: str, size: int) -> np.ndarray:
    """Centre crop of a scikit-image sample image as (H, W, C) float32 in [0, 1]."""
    from skimage import data

    if name not in SAMPLE_IMAGES:
        raise ConfigError(f"unknown sample image {name!r} (known: {', '.join(SAMPLE_IMAGES)})")
    image = getattr(data, name)()
    image = image[:, :, :3] if image.ndim == 3 else image[:, :, None]
    crop = centre_crop(image, min(size, *image.shape[:2])).astype(np.float32)  # square: the shorter side at most
    return crop / (255.0 if image.dtype == np.uint8 else float(crop.max() or 1.0))


def _timed_denoise(name: str, noisy: np.ndarray, sigma: float, **params: Any) -> tuple[np.ndarray, float, float]:
    """The output, wall-clock seconds and CPU seconds of this process (all its threads)."""
    start, start_cpu = time.perf_counter(), time.process_time()
    out = denoise(name, noisy, sigma, **params)
    return out, time.perf_counter() - start, time.process_time() - start_cpu


def _summary(rows: dict[str, dict[str, list]]) -> list[dict[str, Any]]:
    """Per method over all images: mean PSNR (defaults and tuned), seconds and CPU seconds per megapixel, and the
    CPU time against the reference method's."""
    reference = rows.get(REFERENCE_METHOD)
    reference_cpu = sum(reference["cpu"]) / sum(reference["megapixels"]) if reference else None
    summary = []
    for row, record in rows.items():
        megapixels = sum(record["megapixels"])
        cpu_rate = sum(record["cpu"]) / megapixels
        summary.append({
            "method": row,
            "default_psnr": float(np.mean(record["default"])),
            "tuned_psnr": None if np.isnan(record["tuned"]).all() else float(np.nanmean(record["tuned"])),
            "seconds_per_megapixel": sum(record["seconds"]) / megapixels,
            "cpu_seconds_per_megapixel": cpu_rate,
            # CPU time: less disturbed than wall time by other jobs on a shared machine.
            f"cpu_time_vs_{REFERENCE_METHOD}": cpu_rate / reference_cpu if reference_cpu else None,
        })
    return summary


def _print_table(summary: list[dict[str, Any]], sigma_8bit: float, image_count: int, grid_kind: str) -> None:
    print(f"\nGaussian sigma {sigma_8bit:g}/255, {image_count} image(s), mean PSNR; "
          f"'tuned' = {GROUND_TRUTH_LABEL} ({grid_kind} grid); one run, shared machine: compare ratios")
    header = (f"{'method':<34} {'default dB':>10} {'tuned dB':>9} {'s/MP':>9} {'CPU s/MP':>9} "
              f"{'CPU vs ' + REFERENCE_METHOD:>11}")
    print(header)
    print("-" * len(header))
    for item in summary:
        tuned = "-" if item["tuned_psnr"] is None else f"{item['tuned_psnr']:.2f}"
        ratio = item[f"cpu_time_vs_{REFERENCE_METHOD}"]
        print(f"{item['method']:<34} {item['default_psnr']:>10.2f} {tuned:>9} {item['seconds_per_megapixel']:>9.3f} "
              f"{item['cpu_seconds_per_megapixel']:>9.3f} {'-' if ratio is None else f'{ratio:.3g}x':>11}")


def run_bench(args: argparse.Namespace) -> int:
    """Run ``grainwright bench baselines`` (the arguments of :mod:`grainwright.console.commands.bench_baselines`)."""
    names = list(BASELINES) if args.methods == "all" else [m.strip() for m in args.methods.split(",") if m.strip()]
    for name in names:
        get_baseline(name)
    images = [i.strip() for i in args.images.split(",") if i.strip()]
    size = args.size
    if args.quick:
        images, size = images[:2], min(size, 128)
    if args.sigma <= 0:
        raise ConfigError(f"--sigma must be positive, got {args.sigma}")
    sigma = args.sigma / 255.0
    grid_kind = "calibration" if args.quick else "search"
    rng = np.random.default_rng(args.seed)

    # Warm up: the first call of some filters imports scikit-image modules, which must not count as filtering.
    for name in names:
        denoise(name, np.zeros((16, 16, 1), np.float32), sigma)

    rows: dict[str, dict[str, list]] = {}
    per_image: list[dict[str, Any]] = []
    for image_name in images:
        clean = _sample(image_name, size)
        noisy = (clean + rng.normal(0.0, sigma, clean.shape)).astype(np.float32)
        megapixels = clean.shape[0] * clean.shape[1] / 1e6
        entry: dict[str, Any] = {"image": image_name, "shape": list(clean.shape), "noisy_psnr": psnr(clean, noisy, 1.0),
                                 "methods": {}}
        print(f"{image_name}: {clean.shape[0]} x {clean.shape[1]} x {clean.shape[2]}, noisy "
              f"{entry['noisy_psnr']:.2f} dB", flush=True)
        runs = [(name, name, {}) for name in names]
        if "bm3d" in names:
            runs.append((HARD_STAGE_ROW, "bm3d", {"wiener": False}))
        for row, name, extra in runs:
            out, seconds, cpu_seconds = _timed_denoise(name, noisy, sigma, **extra)
            figures = {"default_psnr": psnr(clean, out, 1.0), "seconds_per_megapixel": seconds / megapixels,
                       "cpu_seconds_per_megapixel": cpu_seconds / megapixels}
            if row == name:
                grid = get_baseline(name).grid(grid_kind)
                tuning = tune_on_ground_truth(name, noisy, clean, sigma, grid=grid)
                figures.update(tuned_psnr=tuning.score, tuned_params=tuning.params, grid_points=len(grid))
            entry["methods"][row] = figures
            record = rows.setdefault(row, {"default": [], "tuned": [], "seconds": [], "cpu": [], "megapixels": []})
            record["default"].append(figures["default_psnr"])
            record["tuned"].append(figures.get("tuned_psnr", np.nan))
            record["seconds"].append(seconds)
            record["cpu"].append(cpu_seconds)
            record["megapixels"].append(megapixels)
        per_image.append(entry)

    summary = _summary(rows)
    _print_table(summary, args.sigma, len(images), grid_kind)

    if args.json:
        write_json_atomic(args.json, {
            "sigma_8bit": args.sigma, "images": images, "crop": size, "seed": args.seed, "grid": grid_kind,
            "tuned_label": GROUND_TRUTH_LABEL, "machine": platform.platform(), "cpus": os.cpu_count(),
            "summary": summary, "per_image": per_image,
        })
    return 0
