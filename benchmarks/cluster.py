"""``grainwright bench cluster MODEL.onnx``: the same batch on one machine and on local Dask clusters.

On one batch of generated frames (the inspection scenario of :mod:`grainwright.inference.synthetic.scenario`,
written as 16-bit TIFFs), in one run:

- the local ``denoise`` path with all the cores as ONNX Runtime threads;
- a cluster of 1 worker process with all the cores as ONNX Runtime threads (the cluster path's own overhead
  against the local path: scheduling, transfers, the model sent to the worker);
- a cluster of as many worker processes as cores, 1 ONNX Runtime thread each;
- the per-task overhead: a batch of tiny frames on the 1-worker cluster against the local path, per file.

Cluster start-up (worker processes launched and connected) is timed separately from each batch; the batch time
includes sending the model to the workers. Rounds are interleaved (local, then each cluster) and the median of
``repeat`` rounds is reported, so a change of load on a shared machine hits every contender alike.
"""
from __future__ import annotations

import argparse
import contextlib
import os
import platform
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from grainwright.inference.common.atomic import write_json_atomic
from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images.imageio import write_image
from grainwright.inference.runtime import cluster
from grainwright.inference.runtime.batch import denoise_files, plan_batch
from grainwright.inference.runtime.runner import OnnxDenoiser
from grainwright.inference.synthetic.scenario import generate_frame

# Distinct scenes rendered; further frames repeat them under other names (speed does not depend on content).
DISTINCT_SCENES = 4
# Edge of the frames of the per-task overhead batch (pixels): small enough that denoising costs next to nothing.
TINY_EDGE = 48


def _write_frames(folder: Path, count: int, edge: int) -> Path:
    scenes = [generate_frame(edge, edge, seed).noisy for seed in range(min(count, DISTINCT_SCENES))]
    for index in range(count):
        write_image(folder / f"frame{index:05d}.tif", scenes[index % len(scenes)])
    return folder


def _check(results: list[Any], expected: int) -> float:
    """Megapixels denoised; refuses a batch in which any file was not done."""
    failed = [result for result in results if result.status != "done"]
    if failed or len(results) != expected:
        raise ConfigError(f"benchmark batch incomplete: {failed[0].message if failed else len(results)}")
    return sum(result.megapixels for result in results)


def _local(model: Path, threads: int, inputs: Path, out: Path) -> Callable[[], float]:
    denoiser = OnnxDenoiser(model, threads=threads)

    def run() -> float:
        results = list(denoise_files(denoiser, [inputs], out, overwrite=True))
        return _check(results, len(results))

    return run


def _on_cluster(client: Any, model: Path, threads: int, inputs: Path, out: Path) -> Callable[[], float]:
    denoiser = OnnxDenoiser(model, threads=1)  # the client's copy only plans; workers load their own

    def run() -> float:
        jobs, expected = plan_batch(denoiser, [inputs], out, overwrite=True)
        results = list(cluster.denoise_on_cluster(client, denoiser, jobs, expected, threads=threads, overwrite=True))
        return _check(results, len(jobs))

    return run


def _timed(action: Callable[[], float]) -> tuple[float, float]:
    start = time.perf_counter()
    megapixels = action()
    return time.perf_counter() - start, megapixels


def _start_clusters(stack: contextlib.ExitStack, layouts: dict[str, tuple[int, int]], model: Path, frames: Path,
                    tiny: Path, folder: Path) -> tuple[dict[str, float], dict[str, Any], dict[str, Any]]:
    """One local cluster per layout, each start-up timed; the batch actions on each (and the tiny-frame action
    on the 1-worker one)."""
    startup, contenders, tiny_contenders = {}, {}, {}
    for index, (label, (workers, threads)) in enumerate(layouts.items()):
        start = time.perf_counter()
        client = stack.enter_context(cluster.connect(local_workers=workers))
        client.wait_for_workers(workers)
        startup[label] = time.perf_counter() - start
        contenders[label] = _on_cluster(client, model, threads, frames, folder / f"out{index}")
        if workers == 1:
            tiny_contenders[label] = _on_cluster(client, model, threads, tiny, folder / f"tiny{index}")
    return startup, contenders, tiny_contenders


def run_bench(args: argparse.Namespace) -> int:
    """Run ``grainwright bench cluster`` (the arguments of :mod:`grainwright.console.commands.bench_cluster`)."""
    cluster.require_distributed()
    model, cores = Path(args.model), args.cores or os.cpu_count() or 1
    figures: dict[str, Any] = {
        "model": model.name, "frames": args.frames, "edge": args.size, "cores": cores, "repeat": args.repeat,
        "machine": platform.platform(), "cpus": os.cpu_count(), "load_average": os.getloadavg(),
    }
    layouts = {f"cluster 1 worker x {cores} threads": (1, cores), f"cluster {cores} workers x 1 thread": (cores, 1)}
    seconds: dict[str, list[float]] = {}
    with tempfile.TemporaryDirectory(prefix="grainwright-bench-cluster-") as temp, contextlib.ExitStack() as stack:
        folder = Path(temp)
        frames = _write_frames(folder / "frames", args.frames, args.size)
        tiny = _write_frames(folder / "tiny", args.overhead_files, TINY_EDGE)
        figures["startup_seconds"], contenders, tiny_contenders = _start_clusters(stack, layouts, model, frames,
                                                                                  tiny, folder)
        contenders = {"local": _local(model, cores, frames, folder / "out-local"), **contenders}
        tiny_contenders = {"local": _local(model, cores, tiny, folder / "tiny-local"), **tiny_contenders}
        for _ in range(args.repeat):  # interleaved rounds
            for label, action in contenders.items():
                elapsed, figures["megapixels"] = _timed(action)
                seconds.setdefault(label, []).append(elapsed)
            for label, action in tiny_contenders.items():
                seconds.setdefault(f"tiny {label}", []).append(_timed(action)[0])
    figures["raw_seconds"] = seconds
    figures.update(_summary(figures, seconds, list(layouts), args.overhead_files))
    _print(figures)
    if args.json:
        write_json_atomic(args.json, figures)
    return 0


def _summary(figures: dict[str, Any], seconds: dict[str, list[float]], layouts: list[str],
             overhead_files: int) -> dict[str, Any]:
    median = {label: statistics.median(values) for label, values in seconds.items()}
    local, one_worker = median["local"], median[layouts[0]]
    per_file = {label: median[label] / figures["frames"] for label in ("local", *layouts)}
    return {
        "median_seconds": median,
        "seconds_per_frame": per_file,
        "mp_per_s": {label: figures["megapixels"] / median[label] for label in ("local", *layouts)},
        "cluster_of_one_overhead": one_worker / local - 1,
        "best_cluster_speedup": local / min(median[label] for label in layouts),
        "per_task_overhead_seconds": (median[f"tiny {layouts[0]}"] - median["tiny local"]) / overhead_files,
    }


def _print(figures: dict[str, Any]) -> None:
    print(f"model {figures['model']}, {figures['frames']} frames of {figures['edge']} x {figures['edge']} "
          f"({figures['megapixels']:.1f} MP), {figures['cores']} cores, median of {figures['repeat']} round(s), "
          f"load average at start {', '.join(f'{x:.1f}' for x in figures['load_average'])}")
    print("\ncluster start-up (not included below):")
    for label, value in figures["startup_seconds"].items():
        print(f"  {label:34s} {value:7.2f} s")
    print("\nbatch (median):")
    for label, value in figures["median_seconds"].items():
        if label.startswith("tiny"):
            continue
        print(f"  {label:34s} {value:7.2f} s  {figures['seconds_per_frame'][label]:6.3f} s/frame  "
              f"{figures['mp_per_s'][label]:6.3f} MP/s")
    print(f"\ncluster of one against the local path: {figures['cluster_of_one_overhead']:+.1%}")
    print(f"fastest cluster layout against the local path: {figures['best_cluster_speedup']:.2f}x")
    print(f"per-task overhead ({TINY_EDGE} x {TINY_EDGE} frames, 1-worker cluster minus local, per file): "
          f"{figures['per_task_overhead_seconds'] * 1000:.1f} ms")
