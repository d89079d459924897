"""The line service under load: capacity against the bare ONNX Runtime loop, then fixed-rate arrivals.

Behind ``grainwright bench watch``. Everything is local files in a scratch folder; the service is the real
``grainwright watch`` command in its own process (``--inputs delete``, ``--arrival renamed``), fed by this process:

1. **Capacity.** ``frames`` generated 16-bit frames are decoded into memory and denoised by the bare ONNX Runtime
   call (one ``session.run`` per whole frame, padded to the alignment, nothing else) in a loop; then the same
   frames are renamed into the watched folder at once (a backlog) and the service works through them: read, hash,
   tile, run, convert, write durably, journal, delete the input. Frames per second of each, their ratio (goal
   >= 0.85), interleaved over ``repeat`` rounds (median). One frame is passed through the service first, so its
   ONNX Runtime arena is warm like the bare loop's.
2. **Fixed-rate load.** For each fraction of the measured capacity (default 0.5 and 0.9), frames are renamed into
   the folder at that fixed rate for ``seconds`` seconds, then the service is given time to drain. Latency is
   from the rename (taken by this process) to the journal's ``done`` line (stamped after the output is durable);
   p50/p95/p99, the queue length sampled every second (this process's count of dropped minus journaled frames),
   whether it drained, and the count of frames lost (dropped, never journaled) or duplicated (journaled twice).
3. **Soak** (``soak_minutes`` > 0): the fixed-rate run at ``soak_load`` for that many minutes, with the service's
   resident memory (from its status file) every ten seconds; RSS growth from minute 5 to the end (goal < 5 %).

A frame is dropped by hard-linking one of a pool of distinct generated frames into the watched folder under a new
name: like a rename, the name appears with the whole file behind it, and nothing is copied.
"""
from __future__ import annotations

import json
import os
import statistics
import subprocess
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from grainwright.inference.common.errors import GrainwrightError
from grainwright.inference.images.imageio import read_image, write_image
from grainwright.inference.runtime.line_journal import JOURNAL_NAME
from grainwright.inference.runtime.line_status import STATUS_NAME
from grainwright.inference.runtime.runner import OnnxDenoiser
from grainwright.inference.runtime.tiling import pad_to_alignment

POOL_SIZE = 16  # distinct generated frames; the rest are hard links to them
DRAIN_GRACE = 120.0  # seconds after the last drop a run may take to drain before it counts as not drained


@dataclass
class LoadRun:
    """One fixed-rate run."""

    fraction: float
    rate_fps: float
    seconds: float
    dropped: int = 0
    done: int = 0
    lost: int = 0
    duplicated: int = 0
    drained: bool = False
    latency_s: dict[str, float] = field(default_factory=dict)
    queue_series: list[int] = field(default_factory=list)
    rss_series_mib: list[tuple[float, float]] = field(default_factory=list)


def generate_pool(folder: Path, size: int, count: int = POOL_SIZE, high: float = 4095.0) -> list[Path]:
    """Distinct 16-bit frames: smooth shading plus Gaussian noise at 2% of the range (our own generated data)."""
    rng = np.random.default_rng(0)
    ramp = np.linspace(0.2, 0.8, size, dtype=np.float32)
    paths = []
    for index in range(count):
        shade = (np.roll(ramp, index * 7)[:, None] * ramp[None, ::-1] + 0.1)[:, :, None]
        noisy = shade * high + rng.normal(0, 0.02 * high, (size, size, 1))
        paths.append(write_image(folder / f"pool{index:02d}.tif", np.clip(noisy, 0, high).astype(np.uint16)))
    return paths


def bare_loop_fps(denoiser: OnnxDenoiser, arrays: list[np.ndarray]) -> float:
    """Frames per second of one session call per whole frame, inputs prepared beforehand (the bare loop)."""
    feeds = [np.ascontiguousarray(pad_to_alignment(a, denoiser.spec.alignment).astype(np.float32)
                                  .transpose(2, 0, 1)[None]) for a in arrays]
    denoiser.session.run([denoiser.output_name], {"image": feeds[0]})  # warm-up
    start = time.perf_counter()
    for feed in feeds:
        denoiser.session.run([denoiser.output_name], {"image": feed})
    return len(feeds) / (time.perf_counter() - start)


class ServiceUnderTest:
    """A ``grainwright watch`` process on a scratch folder, and the frames this process drops into it."""

    def __init__(self, launcher: list[str], model: Path, work: Path, pool: list[Path], threads: int,
                 fixed_pattern: str, poll: float = 0.02):
        self.watch, self.out = work / "in", work / "out"
        for folder in (self.watch, self.out):
            folder.mkdir(parents=True, exist_ok=True)
        self.pool = pool
        self.dropped: dict[str, float] = {}
        self._counter = 0
        command = [*launcher, str(model), str(self.watch), "-o",
                   str(self.out), "--threads", str(threads), "--inputs", "delete", "--poll", str(poll),
                   "--status-every", "1", "--log-every", "3600", "--queue-limit", "100000",
                   "--fixed-pattern", fixed_pattern]
        # the service logs a line per event and a summary per hour: far below a pipe's buffer in a bench run
        self.process = subprocess.Popen(command, stderr=subprocess.PIPE, text=True)

    def drop(self) -> str:
        """Link the next pool frame into the watched folder under a new name: its arrival. Returns the name."""
        name = f"frame{self._counter:07d}.tif"
        os.link(self.pool[self._counter % len(self.pool)], self.watch / name)
        self.dropped[name] = time.time()
        self._counter += 1
        return name

    def journal_done(self) -> dict[str, list[float]]:
        """Input name -> the times of its done lines (epoch seconds)."""
        done: dict[str, list[float]] = {}
        path = self.out / JOURNAL_NAME
        if not path.exists():
            return done
        for line in path.read_text().splitlines():
            try:
                entry = json.loads(line)
            except ValueError:
                continue
            if entry.get("event") == "done":
                done.setdefault(entry["input"], []).append(datetime.fromisoformat(entry["time"]).timestamp())
        return done

    def status(self) -> dict[str, Any] | None:
        try:
            return json.loads((self.out / STATUS_NAME).read_text())
        except (OSError, ValueError):
            return None

    def wait_for(self, condition: Callable[[], bool], timeout: float, what: str) -> None:
        deadline = time.monotonic() + timeout
        while not condition():
            if self.process.poll() is not None:
                raise GrainwrightError(f"the watch service exited ({self.process.returncode}) while {what}: "
                                       f"{self.process.stderr.read()[-500:]}")
            if time.monotonic() > deadline:
                raise GrainwrightError(f"timed out after {timeout:.0f} s while {what}")
            time.sleep(0.02)

    def stop(self) -> int:
        self.process.terminate()
        try:
            self.process.communicate(timeout=300)
        finally:
            self.process.kill()
        return self.process.wait()


def _percentiles(values: list[float]) -> dict[str, float]:
    if not values:
        return {}
    p50, p95, p99 = np.percentile(values, [50, 95, 99])
    return {"p50": float(p50), "p95": float(p95), "p99": float(p99), "max": float(max(values))}


def service_backlog_fps(service: ServiceUnderTest, count: int, timeout: float) -> float:
    """Frames per second of the service working through ``count`` frames renamed in at once."""
    before = sum(len(times) for times in service.journal_done().values())
    start = time.time()
    for _ in range(count):
        service.drop()
    service.wait_for(lambda: sum(len(t) for t in service.journal_done().values()) >= before + count, timeout,
                     f"working through a backlog of {count} frames")
    finished = max(max(t) for t in service.journal_done().values())
    return count / (finished - start)


def fixed_rate(service: ServiceUnderTest, fraction: float, capacity_fps: float, seconds: float,
               log: Callable[[str], None], rss_every: float = 0.0) -> LoadRun:
    """Frames renamed in at ``fraction`` of the capacity for ``seconds``; then drain, latency, loss, duplicates."""
    rate = fraction * capacity_fps
    run = LoadRun(fraction, rate, seconds)
    count = max(1, int(rate * seconds))
    start = time.time() + 0.5
    next_sample = start
    names = []
    for index in range(count):
        due = start + index / rate
        while time.time() < due:
            if time.time() >= next_sample:
                next_sample = _sample(service, run, names, start, rss_every) + 1.0
            time.sleep(min(0.005, max(0.0, due - time.time())))
        names.append(service.drop())
    deadline = time.time() + DRAIN_GRACE
    while time.time() < deadline:
        done = service.journal_done()
        if all(name in done for name in names):
            run.drained = True
            break
        if time.time() >= next_sample:
            next_sample = _sample(service, run, names, start, rss_every) + 1.0
        time.sleep(0.05)
    done = service.journal_done()
    run.dropped = len(names)
    run.done = sum(1 for name in names if name in done)
    run.lost = run.dropped - run.done
    run.duplicated = sum(1 for name in names if len(done.get(name, [])) > 1)
    run.latency_s = _percentiles([done[name][0] - service.dropped[name] for name in names if name in done])
    log(f"  {fraction:.0%} of capacity ({rate:.2f} frames/s for {seconds:.0f} s): {run.dropped} dropped, "
        f"{run.done} done, lost {run.lost}, duplicated {run.duplicated}, latency p50/p95/p99 "
        f"{run.latency_s.get('p50', float('nan')):.2f}/{run.latency_s.get('p95', float('nan')):.2f}/"
        f"{run.latency_s.get('p99', float('nan')):.2f} s, queue max {max(run.queue_series, default=0)}, "
        f"{'drained' if run.drained else 'NOT drained'}")
    return run


def _sample(service: ServiceUnderTest, run: LoadRun, names: list[str], start: float, rss_every: float) -> float:
    now = time.time()
    done = service.journal_done()
    run.queue_series.append(sum(1 for name in names if name not in done))
    if rss_every:
        status = service.status()
        if status is not None and (not run.rss_series_mib or now - start - run.rss_series_mib[-1][0] >= rss_every):
            run.rss_series_mib.append((now - start, float(status["rss_mib"])))
    return now


def rss_growth(series: list[tuple[float, float]], from_seconds: float = 300.0) -> float | None:
    """Relative RSS growth from the first sample at or after ``from_seconds`` to the last sample."""
    later = [rss for at, rss in series if at >= from_seconds]
    if len(later) < 2:
        return None
    return later[-1] / later[0] - 1.0


def run_bench(model: Path, launcher: list[str], *, frames: int = 100, size: int = 512, threads: int = 2,
              repeat: int = 1, loads: tuple[float, ...] = (0.5, 0.9), seconds: float = 60.0,
              soak_minutes: float = 0.0, soak_load: float = 0.5, fixed_pattern: str = "never",
              log: Callable[[str], None] = print) -> dict[str, Any]:
    """Measure the line service (see the module docstring); returns every figure as a JSON-ready dict.

    ``launcher`` is the command that starts ``grainwright watch`` (the front end supplies it), e.g.
    ``[sys.executable, "-m", "grainwright.console", "watch"]``.
    ``fixed_pattern`` is the service's ``--fixed-pattern``: ``never`` (the default here) compares the service's
    own work with the bare loop; ``auto`` adds the banding detection ``denoise`` runs on every frame.
    """
    figures: dict[str, Any] = {"model": model.name, "frames": frames, "size": size, "threads": threads,
                               "fixed_pattern": fixed_pattern, "cpus": os.cpu_count()}
    with tempfile.TemporaryDirectory(prefix="grainwright-bench-watch-") as temp:
        work = Path(temp)
        pool = generate_pool(work / "pool", size)
        arrays = [read_image(pool[index % len(pool)]) for index in range(frames)]
        denoiser = OnnxDenoiser(model, threads=threads)
        service = ServiceUnderTest(launcher, model, work, pool, threads, fixed_pattern)
        try:
            service.wait_for(lambda: service.status() is not None, 300, "starting")
            service.drop()  # warm-up frame
            service.wait_for(lambda: len(service.journal_done()) == 1, 300, "doing the warm-up frame")
            log(f"capacity on a backlog of {frames} frames of {size} x {size} (uint16), {threads} thread(s):")
            bare, served = [], []
            for _ in range(repeat):  # interleaved, so a change in the machine's load hits both alike
                bare.append(bare_loop_fps(denoiser, arrays))
                served.append(service_backlog_fps(service, frames, timeout=600 + 60 * frames))
                log(f"  bare ONNX Runtime loop {bare[-1]:.3f} frames/s, service {served[-1]:.3f} frames/s")
            capacity = statistics.median(served)
            figures["capacity"] = {"bare_fps": statistics.median(bare), "service_fps": capacity,
                                   "ratio": capacity / statistics.median(bare), "rounds": {"bare": bare,
                                                                                       "service": served}}
            log(f"  service / bare = {figures['capacity']['ratio']:.3f} (goal >= 0.85)")
            log("fixed-rate arrivals:")
            figures["load"] = [vars(fixed_rate(service, fraction, capacity, seconds, log)) for fraction in loads]
            if soak_minutes > 0:
                log(f"soak: {soak_minutes:g} min at {soak_load:.0%} of capacity:")
                soak = fixed_rate(service, soak_load, capacity, soak_minutes * 60, log, rss_every=10.0)
                figures["soak"] = {**vars(soak), "rss_growth_from_minute_5": rss_growth(soak.rss_series_mib)}
                growth = figures["soak"]["rss_growth_from_minute_5"]
                log(f"  RSS growth from minute 5 to the end: "
                    f"{'n/a (shorter than 5 minutes)' if growth is None else f'{growth:+.2%}'} (goal < 5 %)")
        finally:
            figures["service_exit_code"] = service.stop()
    return figures
