"""``grainwright bench models``: size figures and speed of every architecture, torch vs ONNX Runtime FP32 vs INT8.

All three run in one process, interleaved round by round, on the same 1024 x 1024 image (scikit-image's
``camera`` sample, tiled, with Gaussian noise), so the ratios are comparable even on a busy machine; the
absolute figures are not. Weights are randomly initialised: the speed of a convolution does not depend on them,
and the INT8 figure is calibrated on patches of other scikit-image sample images.
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import torch
from skimage import data

from grainwright.inference.images.normalization import Normalization
from grainwright.models.export import ExportGraph, export_graph
from grainwright.models.onnx_io import CalibrationImage, run_session, session_for
from grainwright.models.quantize import quantize_model
from grainwright.models.registry import MODELS, build_model
from grainwright.models.working_range import WorkingRange

# Targets from the models issue, measured as ratios in one run.
FP32_OVER_TORCH_TARGET = 1.8
INT8_OVER_FP32_TARGET = 2.0
NOISE_SIGMA = 25.0  # native units of 8-bit data


@dataclass
class BenchRow:
    name: str
    parameters: int
    macs_per_pixel: float
    receptive_field: int
    torch_mps: float
    fp32_mps: float
    int8_mps: float
    int8_psnr_db: float

    @property
    def fp32_over_torch(self) -> float:
        return self.fp32_mps / self.torch_mps

    @property
    def int8_over_fp32(self) -> float:
        return self.int8_mps / self.fp32_mps

    def gflops(self, mps: float) -> float:
        """Effective GFLOP/s (2 FLOPs per multiply-accumulate) at ``mps`` megapixels per second."""
        return 2.0 * self.macs_per_pixel * mps * 1e6 / 1e9


def _noisy(image: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    return np.clip(np.rint(image.astype(np.float32) + rng.normal(0.0, NOISE_SIGMA, image.shape)), 0, 255).astype(np.float32)


def bench_image(size: int, channels: int, rng: np.random.Generator) -> np.ndarray:
    """``(1, C, size, size)`` noisy 8-bit native values from the tiled ``camera`` sample image."""
    camera = data.camera()
    reps = -(-size // camera.shape[0])
    tiled = np.tile(camera, (reps, reps))[:size, :size]
    return np.stack([_noisy(tiled, rng) for _ in range(channels)])[None]


def calibration_images(channels: int, rng: np.random.Generator) -> list[CalibrationImage]:
    """Noisy 8-bit sample images other than the benchmark's, as calibration and held-out data for INT8."""
    samples = {"moon": data.moon(), "coins": data.coins(), "brick": data.brick(), "grass": data.grass()}
    return [CalibrationImage(Path(f"skimage.data.{name}"), np.stack([_noisy(image, rng) for _ in range(channels)]))
            for name, image in samples.items()]


def _best_time(run: Callable[[], Any], best: float) -> float:
    start = time.perf_counter()
    run()
    return min(best, time.perf_counter() - start)


def bench_architecture(name: str, *, size: int = 1024, channels: int = 1, threads: int = 2, repeats: int = 3,
                       seed: int = 0) -> BenchRow:
    """Time one architecture at its default size: torch eager, ONNX Runtime FP32 and INT8, interleaved."""
    rng = np.random.default_rng(seed)
    torch.manual_seed(seed)
    torch.set_num_threads(threads)
    model = build_model(name, channels).eval()
    normalization = Normalization("uint8", 8, 0.0, 255.0, channels)
    image = bench_image(size, channels, rng)
    sigma = np.full((1, 1, size, size), NOISE_SIGMA, np.float32) if model.takes_noise_map else None

    def noise_map_for(batch: np.ndarray, random: bool) -> np.ndarray | None:
        return np.full((batch.shape[0], 1, *batch.shape[2:]), NOISE_SIGMA, np.float32) if model.takes_noise_map else None

    proto = export_graph(model, normalization)
    report, int8_proto = quantize_model(proto, model, normalization, calibration_images(channels, rng), noise_map_for,
                                        threads=threads, seed=seed)
    fp32, int8 = session_for(proto, threads), session_for(int8_proto, threads)
    # Torch runs the same chain as the ONNX graph: normalisation, network, inverse, on native values.
    eager = ExportGraph(model, WorkingRange(normalization)).eval()
    image_t = torch.from_numpy(image)
    sigma_t = None if sigma is None else torch.from_numpy(sigma)

    runners = {
        "torch": lambda: eager(image_t, sigma_t),
        "fp32": lambda: run_session(fp32, image, sigma),
        "int8": lambda: run_session(int8, image, sigma),
    }
    best = {key: float("inf") for key in runners}
    with torch.inference_mode():
        for key, runner in runners.items():  # warm-up
            runner()
        for _ in range(repeats):
            for key, runner in runners.items():
                best[key] = _best_time(runner, best[key])
    megapixels = size * size / 1e6
    return BenchRow(name, model.parameter_count(), model.macs_per_pixel(), model.receptive_field,
                    megapixels / best["torch"], megapixels / best["fp32"], megapixels / best["int8"],
                    report["psnr_vs_fp32_db"])


def bench_models(names: list[str] | None = None, *, log: Callable[[str], None] = print, **settings: Any) -> list[BenchRow]:
    rows = []
    for name in names or list(MODELS):
        log(f"measuring {name} ...")
        rows.append(bench_architecture(name, **settings))
    return rows


def format_table(rows: list[BenchRow], size: int, threads: int) -> str:
    """A Markdown table with the targets' verdicts."""
    lines = [
        f"| architecture | parameters | MACs/px | RF (px) | torch MP/s | ORT FP32 MP/s | ORT INT8 MP/s | "
        f"FP32/torch (>= {FP32_OVER_TORCH_TARGET}) | INT8/FP32 (>= {INT8_OVER_FP32_TARGET}) | FP32 GFLOP/s | "
        "INT8 vs FP32 PSNR (dB) |",
        "|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for row in rows:
        fp32_ok = "met" if row.fp32_over_torch >= FP32_OVER_TORCH_TARGET else "NOT met"
        int8_ok = "met" if row.int8_over_fp32 >= INT8_OVER_FP32_TARGET else "NOT met"
        lines.append(
            f"| {row.name} | {row.parameters:,} | {row.macs_per_pixel:,.0f} | {row.receptive_field} | "
            f"{row.torch_mps:.2f} | {row.fp32_mps:.2f} | {row.int8_mps:.2f} | {row.fp32_over_torch:.2f}x {fp32_ok} | "
            f"{row.int8_over_fp32:.2f}x {int8_ok} | {row.gflops(row.fp32_mps):.0f} | {row.int8_psnr_db:.1f} |"
        )
    lines.append(f"\n{size}x{size} grayscale, {threads} threads, best of the interleaved rounds; random weights.")
    return "\n".join(lines)
