"""The benchmark behind ``grainwright bench runtime MODEL.onnx``: the runtime's speed and memory, measured side
by side in one run.

- the bare ONNX Runtime call on a whole image (default 2048 x 2048) against the full file-to-file ``denoise``
  path on the same image (read, pad, tile, batch, stitch, convert, write), and their ratio;
- the full path at several tile sizes (how the default was chosen);
- FP32 against INT8 (``NAME.int8.onnx`` beside the model, or ``--int8``);
- seconds per 1-megapixel frame at 1 and 2 threads;
- peak resident memory (as the OS reports it, from ``wait4``) of ``denoise`` in a fresh process on generated
  16-bit tiled TIFFs of two sizes (default 16 and 256 megapixels), deleted afterwards.

Optionally also measures and writes the machine profile of :mod:`grainwright.inference.runtime.machine_profile`
(``--profile``): seconds per GMAC for FP32 and INT8 at the chosen threads, for sizing a model to a cycle time.
Timings on a shared machine are noisy; the ratios come from runs interleaved in one process.
"""
from __future__ import annotations

import argparse
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np

from grainwright.inference.common.atomic import write_json_atomic
from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images.imageio import write_image
from grainwright.inference.images.large_tiff import write_tiled_tiff
from grainwright.inference.runtime.batch import denoise_files
from grainwright.inference.runtime.machine_profile import measure_profile, save_profile
from grainwright.inference.runtime.runner import OnnxDenoiser
from grainwright.inference.runtime.tiling import pad_to_alignment

# Edge of the tiles the generated large TIFFs are written with (pixels).
GENERATED_TIFF_TILE = 512


def _timed(action: Callable[[], Any]) -> float:
    start = time.perf_counter()
    action()
    return time.perf_counter() - start


def _test_image(size: int, channels: int, dtype: np.dtype, high: float, seed: int = 0) -> np.ndarray:
    """Smooth shading plus Gaussian noise at 2% of the range: procedurally generated, no real scene."""
    rng = np.random.default_rng(seed)
    ramp = np.linspace(0.2, 0.8, size, dtype=np.float32)
    clean = (ramp[:, None] * ramp[None, ::-1] + 0.2)[:, :, None] * np.ones(channels, np.float32)
    noisy = clean * high + rng.normal(0, 0.02 * high, (size, size, channels)).astype(np.float32)
    return np.clip(noisy, 0, high).astype(dtype)


def _bare_call(denoiser: OnnxDenoiser, image: np.ndarray) -> Callable[[], Any]:
    """The whole (aligned) image in one session call, nothing else."""
    padded = pad_to_alignment(image, denoiser.spec.alignment)
    feeds = {"image": np.ascontiguousarray(padded.astype(np.float32).transpose(2, 0, 1)[None])}
    if denoiser.spec.takes_noise_map:
        level = denoiser.spec.training_sigma or 0.02 * (denoiser.spec.high or 1.0)
        feeds["noise_sigma"] = np.full((1, 1, *padded.shape[:2]), level, np.float32)
    return lambda: denoiser.session.run([denoiser.output_name], feeds)


def _file_path(denoiser: OnnxDenoiser, source: Path, out_dir: Path) -> Callable[[], Any]:
    def run() -> None:
        [result] = denoise_files(denoiser, [source], out_dir, overwrite=True)
        if result.status != "done":
            raise ConfigError(f"benchmark denoise failed: {result.message}")

    return run


# Linux keeps a process's peak RSS across exec, and a child forked from this (large) process would start from
# our own peak. So a small fresh launcher spawns the measured command and reports its peak (KiB, from wait4).
_LAUNCHER = """
import os, sys
pid = os.posix_spawn(sys.argv[1], sys.argv[1:], os.environ)
_, status, usage = os.wait4(pid, 0)
print(usage.ru_maxrss)
sys.exit(os.waitstatus_to_exitcode(status))
"""


def _computed_overhead(denoiser: OnnxDenoiser, size: int, tile: int | None) -> float:
    """Extra pixels the network computes for a size x size image at kept edge ``tile``, as a fraction."""
    saved, denoiser.tile = denoiser.tile, tile
    overhead = denoiser.plan(size, size).computed_pixels / size**2 - 1
    denoiser.tile = saved
    return overhead


def _generated_tiles(height: int, width: int, tile: int, high: float) -> Iterator[np.ndarray]:
    rng = np.random.default_rng(0)
    for top in range(0, height, tile):
        for left in range(0, width, tile):
            shade = 0.3 + 0.4 * ((top + left) / (height + width))
            noisy = rng.normal(shade * high, 0.02 * high, (tile, tile, 1))
            yield np.clip(noisy, 0, high).astype(np.uint16)


def _peak_rss(denoise_command: list[str], model: Path, megapixels: int, threads: int, folder: Path) -> dict[str, Any]:
    """Peak RSS of ``grainwright denoise`` (``denoise_command``) in a fresh process on a generated 16-bit tiled
    TIFF."""
    edge = int(round(np.sqrt(megapixels * 2**20) / GENERATED_TIFF_TILE)) * GENERATED_TIFF_TILE
    source = folder / f"generated-{megapixels}mp.tif"
    write_tiled_tiff(source, [_generated_tiles(edge, edge, GENERATED_TIFF_TILE, 60000.0)], shape=(edge, edge, 1),
                     dtype=np.dtype(np.uint16), tile=(GENERATED_TIFF_TILE, GENERATED_TIFF_TILE))
    command = [*denoise_command, str(model), str(source), "-o",
               str(folder / "out"), "--threads", str(threads), "-q", "--overwrite"]
    start = time.perf_counter()
    launched = subprocess.run([sys.executable, "-c", _LAUNCHER, *command], capture_output=True, text=True)
    seconds = time.perf_counter() - start
    if launched.returncode != 0:
        raise ConfigError(f"denoise on the generated {megapixels}-MP TIFF failed: {launched.stderr.strip()[-500:]}")
    source.unlink()
    (folder / "out" / source.name).unlink()
    return {"megapixels": edge * edge / 1e6, "edge": edge, "peak_rss_mib": int(launched.stdout.split()[-1]) / 1024,
            "seconds": seconds, "command": " ".join(command[1:])}


def _throughput(fp32: OnnxDenoiser, quantised: OnnxDenoiser | None, image: np.ndarray, tiles: list[int],
                repeat: int, folder: Path, rate: Callable[[float], dict[str, float]]) -> dict[str, Any]:
    """The bare session call against the file-to-file path (FP32, and INT8 when given) and the file-to-file path
    by kept-tile edge: ``repeat`` rounds interleaved so that load changes hit every contender alike, medians
    reported (figures ``raw_seconds``, ``throughput`` and ``tile_sweep``)."""
    source = write_image(folder / "in" / "frame.tif", image)
    contenders = {"fp32": fp32} | ({"int8": quantised} if quantised else {})
    for denoiser in contenders.values():  # warm up kernels and arenas on a small image
        denoiser.run(image[:256, :256])
    timings: dict[str, list[float]] = {}
    default_tile = fp32.tile
    for _ in range(repeat):
        for label, denoiser in contenders.items():
            timings.setdefault(f"{label} bare", []).append(_timed(_bare_call(denoiser, image)))
            timings.setdefault(f"{label} file", []).append(
                _timed(_file_path(denoiser, source, folder / f"out-{label}")))
        for tile in tiles:
            fp32.tile = tile
            timings.setdefault(f"tile {tile}", []).append(_timed(_file_path(fp32, source, folder / "out-tile")))
        fp32.tile = default_tile
    medians = {key: statistics.median(values) for key, values in timings.items()}
    throughput = {key: rate(value) for key, value in medians.items() if not key.startswith("tile")}
    for label in contenders:
        throughput[f"{label} file/bare"] = medians[f"{label} bare"] / medians[f"{label} file"]
    if quantised:
        throughput["int8/fp32 bare speed"] = medians["fp32 bare"] / medians["int8 bare"]
        throughput["int8/fp32 file speed"] = medians["fp32 file"] / medians["int8 file"]
    tile_sweep = {
        tile: {**rate(medians[f"tile {tile}"]), "file/bare": medians["fp32 bare"] / medians[f"tile {tile}"],
               "overlap_cost": _computed_overhead(fp32, image.shape[0], tile)}
        for tile in tiles
    }
    return {"raw_seconds": timings, "throughput": throughput, "tile_sweep": tile_sweep}


def _per_frame(model: Path, int8: Path | None, image: np.ndarray) -> dict[str, float]:
    """Seconds per 1-megapixel frame (1024 x 1024, in memory) at 1 and 2 threads, FP32 and INT8 when given."""
    frame = image[:1024, :1024]
    per_frame = {}
    for threads in (1, 2):
        for label, path in [("fp32", model)] + ([("int8", int8)] if int8 is not None else []):
            denoiser = OnnxDenoiser(path, threads=threads)
            denoiser.run(image[:256, :256])
            per_frame[f"{label} {threads} thread(s)"] = _timed(lambda: denoiser.run(frame))
    return per_frame


def run_bench(args: argparse.Namespace, denoise_command: list[str]) -> int:
    """Run ``grainwright bench runtime`` (the arguments of :mod:`grainwright.console.commands.bench_runtime`);
    ``denoise_command`` launches ``grainwright denoise`` in a fresh process for the peak-memory runs (the command
    layer above knows how)."""
    model = Path(args.model)
    int8 = Path(args.int8) if args.int8 else model.with_name(f"{model.stem}.int8{model.suffix}")
    tiles = [int(t) for t in args.tiles.split(",") if t]
    rss_sizes = [] if args.rss_megapixels == "none" else [int(s) for s in args.rss_megapixels.split(",")]
    fp32 = OnnxDenoiser(model, threads=args.threads)
    quantised = OnnxDenoiser(int8, threads=args.threads) if int8.is_file() else None
    spec = fp32.spec
    dtype = np.dtype(spec.dtype or "uint16")
    high = spec.high or 65535.0
    image = _test_image(args.size, spec.channels or 1, dtype, high)
    megapixels = args.size * args.size / 1e6
    figures: dict[str, Any] = {
        "model": model.name, "architecture": spec.architecture, "macs_per_pixel": spec.macs_per_pixel,
        "receptive_field": spec.receptive_field, "default_tile": fp32.plan(args.size, args.size).tile,
        "threads": args.threads,
        "image": f"{args.size} x {args.size} x {image.shape[2]} {dtype}", "machine": platform.platform(),
        "cpus": os.cpu_count(), "megapixels": megapixels,
    }
    print(f"model {model.name} ({spec.architecture}, {spec.macs_per_pixel or 0:.0f} MACs/pixel, receptive field "
          f"{spec.receptive_field}), {args.threads} thread(s), image {figures['image']}, default tile "
          f"{fp32.tile} (kept {figures['default_tile']} after evening out)")

    def rate(seconds: float, pixels: float = megapixels) -> dict[str, float]:
        entry = {"seconds": seconds, "mp_per_s": pixels / seconds}
        if spec.macs_per_pixel:
            entry["gflop_per_s"] = 2 * spec.macs_per_pixel * pixels * 1e6 / seconds / 1e9
        return entry

    with tempfile.TemporaryDirectory(prefix="grainwright-bench-") as temp:
        folder = Path(temp)
        figures.update(_throughput(fp32, quantised, image, tiles, args.repeat, folder, rate))
        figures["seconds_per_1mp_frame"] = _per_frame(model, int8 if quantised else None, image)
        rss_model = Path(args.rss_model) if args.rss_model else model
        figures["peak_rss"] = [_peak_rss(denoise_command, rss_model, size, args.threads, folder) for size in rss_sizes]
        if len(figures["peak_rss"]) >= 2:
            figures["peak_rss_ratio"] = figures["peak_rss"][-1]["peak_rss_mib"] / figures["peak_rss"][0]["peak_rss_mib"]

    _print(figures)
    if args.json:
        write_json_atomic(args.json, figures, indent=1)
    if args.profile:  # the sizing profile of grainwright.inference.runtime.machine_profile, on its reference stacks
        print(f"\nmachine profile ({args.threads} threads) for 'grainwright train --fit-to':")
        save_profile(measure_profile(threads=args.threads), args.profile)
        print(f"machine profile written to {args.profile}")
    return 0


def _print(figures: dict[str, Any]) -> None:
    print("\nthroughput (median of interleaved runs):")
    for key, value in figures["throughput"].items():
        if isinstance(value, dict):
            flops = f", {value['gflop_per_s']:.1f} GFLOP/s" if "gflop_per_s" in value else ""
            print(f"  {key:10s} {value['seconds']:8.2f} s  {value['mp_per_s']:7.3f} MP/s{flops}")
        else:
            print(f"  {key:24s} {value:.2f}")
    print("\nfile-to-file path by kept-tile edge:")
    for tile, value in figures["tile_sweep"].items():
        print(f"  tile {tile:5d}  {value['mp_per_s']:7.3f} MP/s  file/bare {value['file/bare']:.2f}  "
              f"computed overlap {value['overlap_cost']:.1%}")
    print("\nseconds per 1-MP frame (1024 x 1024, in memory):")
    for key, value in figures["seconds_per_1mp_frame"].items():
        print(f"  {key:18s} {value:.2f} s")
    if figures["peak_rss"]:
        print("\npeak RSS of denoise on generated 16-bit tiled TIFFs:")
        for entry in figures["peak_rss"]:
            print(f"  {entry['megapixels']:7.1f} MP  {entry['peak_rss_mib']:8.1f} MiB  ({entry['seconds']:.0f} s)")
        if "peak_rss_ratio" in figures:
            print(f"  ratio largest/smallest: {figures['peak_rss_ratio']:.3f}")
