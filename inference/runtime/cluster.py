"""Fan a denoise batch out to a Dask cluster: the same per-file engine, the same outputs, many machines.

The client (the machine running ``grainwright denoise --scheduler ADDRESS`` or ``--local-workers N``) plans the
batch exactly as the local path does (:func:`grainwright.inference.runtime.batch.plan_batch`), then submits one
task per file to the ``distributed`` scheduler, keeping a bounded number in flight so that an archive of millions
of files never floods the scheduler. Each task runs :func:`grainwright.inference.runtime.batch.denoise_file`
on a worker, so outputs, atomic writes, skip-what-is-done, ``overwrite`` and the fault classification are those
of the local path; the output's record gains a ``worker`` field (host, process, address), which the
"same model and settings" check on reruns ignores.

- The model travels by content: its bytes and SHA-256 go to every worker (now and joining later) in a worker
  plugin, which checks the hash, writes the bytes to a private temporary folder under the model's own file name
  and loads one :class:`OnnxDenoiser` per worker process.
- Inputs and outputs are paths on a filesystem every worker sees under the same names (a shared mount);
  remote object stores (fsspec URLs) are not supported.
- Each worker thread denoises one whole file at a time with ``threads`` ONNX Runtime threads, so
  workers x worker threads x ``threads`` should equal the cores. A file is never split: a large tiled or striped
  TIFF goes through the streamed, bounded-memory path on one worker.
- A worker process that dies mid-file leaves no output under the final name (writes are atomic); the scheduler
  reruns its tasks elsewhere. A task whose workers died more than the scheduler's ``allowed-failures`` times
  comes back as ``KilledWorker``; since a death also counts against every other task queued on that worker,
  such files are retried once more one at a time, and a file that still kills its workers when it is the only
  task in flight is reported as failed, by name.

``distributed`` is an optional extra (``pip install "grainwright[cluster]"``); this module imports it only when
a cluster is used.
"""
from __future__ import annotations

import contextlib
import hashlib
import itertools
import os
import shutil
import socket
import tempfile
import time
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from tqdm import tqdm

from grainwright.inference.common.atomic import remove_stale_temporaries, write_bytes_atomic
from grainwright.inference.common.errors import ConfigError, GrainwrightError
from grainwright.inference.runtime.batch import FileResult, Job, denoise_file, read_record
from grainwright.inference.runtime.faults import Fault, FaultKind
from grainwright.inference.runtime.runner import OnnxDenoiser

try:  # the optional extra; only this module touches it
    from distributed.diagnostics.plugin import WorkerPlugin
except ImportError:  # pragma: no cover - exercised by the missing-extra test in a subprocess
    WorkerPlugin = object  # type: ignore[assignment,misc]

MISSING_EXTRA = ("the cluster options need Dask's distributed scheduler, which is not installed; install it with "
                 "pip install \"grainwright[cluster]\" (or pip install distributed)")
# Tasks in flight per worker thread: one running and one queued, so a worker never waits for the client.
IN_FLIGHT_PER_SLOT = 2
# Test-only fault injection, read by worker processes; never set in production. The first worker process to
# start its K-th file exits in the middle of it (once per cluster: MARKER is created exclusively) ...
EXIT_ON_FILE_VARIABLE = "GRAINWRIGHT_TEST_WORKER_EXIT_ON_FILE"  # "K:MARKER"
# ... and every worker process exits when it starts denoising an input of this name (a decoder crash).
EXIT_ON_NAME_VARIABLE = "GRAINWRIGHT_TEST_WORKER_EXIT_ON_NAME"  # "NAME"


def require_distributed() -> None:
    """Raise a one-line :class:`ConfigError` naming the extra to install when ``distributed`` is missing."""
    if WorkerPlugin is object:
        raise ConfigError(MISSING_EXTRA)


class ModelLoader(WorkerPlugin):
    """Worker plugin: the model's bytes and hash; on each worker process, one loaded :class:`OnnxDenoiser`.

    Parameters
    ----------
    name : str
        The model's file name (kept, since output records name the model file).
    data : bytes
        The ONNX file's content.
    sha256 : str
        Its SHA-256 (hex), checked on arrival.
    options : dict
        Keyword arguments of :class:`OnnxDenoiser` (threads, tile, batch, strength, noise_sigma, ensemble, spec).
    """

    idempotent = True  # registering the same model and settings again is a no-op

    def __init__(self, name: str, data: bytes, sha256: str, options: dict[str, Any]):
        self.name, self.data, self.sha256, self.options = name, data, sha256, options
        self.denoiser: OnnxDenoiser | None = None
        self.folder: Path | None = None
        self.files_started = 0

    def setup(self, worker: Any) -> None:
        if hashlib.sha256(self.data).hexdigest() != self.sha256:
            raise GrainwrightError(f"model {self.name} arrived damaged on worker {worker.address} (SHA-256 differs)")
        self.folder = Path(tempfile.mkdtemp(prefix="grainwright-model-"))
        path = write_bytes_atomic(self.folder / self.name, self.data)
        self.denoiser = OnnxDenoiser(path, **self.options)
        self.data = b""  # the loaded session is all a worker needs from here on

    def teardown(self, worker: Any) -> None:
        if self.folder is not None:
            shutil.rmtree(self.folder, ignore_errors=True)


def plugin_name(sha256: str, options: dict[str, Any]) -> str:
    """One plugin per model and settings, so that batches with other settings can share a cluster."""
    settings = hashlib.sha256(repr(sorted(options.items())).encode()).hexdigest()[:12]
    return f"grainwright-model-{sha256[:16]}-{settings}"


class _ExitMidFile:
    """A tiles progress bar that ends the worker process at its first update (test-only fault injection)."""

    def reset(self, total: int | None = None) -> None:
        pass

    def update(self, count: int = 1) -> None:
        os._exit(70)


def _injected_fault(loader: ModelLoader, source: Path) -> _ExitMidFile | None:
    """The test-only hooks of ``EXIT_ON_FILE_VARIABLE`` and ``EXIT_ON_NAME_VARIABLE`` (None when unset)."""
    if os.environ.get(EXIT_ON_NAME_VARIABLE) == source.name:
        return _ExitMidFile()
    setting = os.environ.get(EXIT_ON_FILE_VARIABLE)
    if setting:
        count, marker = setting.split(":", 1)
        if loader.files_started == int(count):
            with contextlib.suppress(FileExistsError):
                os.close(os.open(marker, os.O_CREAT | os.O_EXCL | os.O_WRONLY))
                return _ExitMidFile()
    return None


def denoise_on_worker(name: str, job: Job, expected: dict[str, Any], run: str, options: dict[str, Any]) -> FileResult:
    """The task: denoise one file with this worker process's loaded model (plugin ``name``) in batch ``run``."""
    from distributed import get_worker

    worker = get_worker()
    loader = worker.plugins.get(name)
    if loader is None or loader.denoiser is None:
        raise GrainwrightError(f"worker {worker.address} has no model loaded (plugin {name} missing)")
    loader.files_started += 1
    made_by = {"host": socket.gethostname(), "pid": os.getpid(), "address": worker.address, "run": run}
    result = denoise_file(loader.denoiser, job, expected, extra_record={"worker": made_by},
                          tiles_bar=_injected_fault(loader, job.source), **options)
    if result.status == "skipped" and ((read_record(job.output) or {}).get("worker") or {}).get("run") == run:
        # Made in this very batch by a worker that died before its result reached the client: the scheduler
        # reran the task, which found the output complete.
        return FileResult(job.source, job.output, "done", "made by a worker that died before reporting it")
    return result


def default_threads(local_workers: int | None) -> int:
    """ONNX Runtime threads per file: the cores shared among local workers; 1 on a remote cluster, whose
    workers run one file per worker thread (``dask worker --nthreads``)."""
    if local_workers:
        return max(1, (os.cpu_count() or 1) // local_workers)
    return 1


@contextlib.contextmanager
def connect(scheduler: str | None = None, local_workers: int | None = None) -> Iterator[Any]:
    """A ``distributed.Client`` on the scheduler at ``scheduler``, or on a new local cluster of
    ``local_workers`` worker processes (one worker thread each), closed on exit."""
    require_distributed()
    import logging

    from distributed import Client, LocalCluster

    if (scheduler is None) == (local_workers is None):
        raise ConfigError("give either a scheduler address or a number of local workers")
    if local_workers is not None:
        if local_workers < 1:
            raise ConfigError(f"--local-workers must be at least 1, got {local_workers}")
        cluster = LocalCluster(n_workers=local_workers, threads_per_worker=1, processes=True, dashboard_address=":0",
                               silence_logs=logging.ERROR)
        try:
            with Client(cluster) as client:
                yield client
                _let_restarts_finish(client, local_workers)
        finally:
            _close_local(cluster)
        return
    try:
        client = Client(scheduler, timeout="30s")
    except OSError as error:
        raise ConfigError(f"cannot reach the Dask scheduler at {scheduler}: {error}") from None
    with client:
        yield client


# Longest wait, at the end of a batch, for local workers that died near its end to come back (a restart takes
# about a second on an idle machine).
RESTART_WAIT_SECONDS = 10.0


def _let_restarts_finish(client: Any, workers: int) -> None:
    """Wait (at most ``RESTART_WAIT_SECONDS``) until a local cluster has all its workers again: closing it while
    a nanny is still restarting a dead worker process is the race :func:`_close_local` guards against."""
    with contextlib.suppress(Exception):  # a timeout only means the close may meet a restart
        client.wait_for_workers(workers, timeout=RESTART_WAIT_SECONDS)


def _close_local(cluster: Any) -> None:
    """Shut a local cluster down. When a worker died near the end of a batch and its nanny is still restarting
    it, distributed's close can fail on that half-started process (an assertion in its ``join``; seen with
    distributed 2026.8 in about one run in ten of the test that kills workers). Every result is in and every
    output written (atomically) by then, so a failed close is tried once more and otherwise ignored: it
    cannot lose a file, and a traceback after a finished batch would only mislead."""
    for _ in range(2):
        try:
            cluster.close()
            return
        except Exception:  # see the docstring: nothing is left to lose
            continue


def _slots(client: Any) -> int:
    return sum(worker["nthreads"] for worker in client.scheduler_info()["workers"].values())


def _lost(job: Job, error: BaseException) -> FileResult:
    """A file whose task came back with an exception instead of a result."""
    from distributed import KilledWorker

    if isinstance(error, KilledWorker):
        reason = ("worker processes kept dying while denoising this file, also when it was the only file in flight "
                  "(a crash in the decoder or the model?); nothing was written for it")
    else:
        reason = f"the cluster task failed: {' '.join(str(error).split()) or type(error).__name__}"
    fault = Fault(FaultKind.INPUT, job.source, reason)
    return FileResult(job.source, None, "failed", str(fault), fault=fault)


class _Progress:
    """A tqdm bar of files with done, failed and MP/s; calling it with a result counts that result."""

    def __init__(self, total: int, enabled: bool):
        self.bar = tqdm(total=total, unit="file", disable=not enabled)
        self.counts = {"done": 0, "failed": 0}
        self.megapixels, self.start = 0.0, time.perf_counter()

    def __call__(self, result: FileResult) -> FileResult:
        self.bar.update(1)
        if result.status in self.counts:
            self.counts[result.status] += 1
        self.megapixels += result.megapixels
        elapsed = time.perf_counter() - self.start
        self.bar.set_postfix_str(f"done {self.counts['done']}, failed {self.counts['failed']}, "
                                 f"{self.megapixels / elapsed if elapsed > 0 else 0.0:.2f} MP/s")
        return result


def _register_model(client: Any, denoiser: OnnxDenoiser, threads: int) -> str:
    """Send the model's bytes and settings to every worker (present and future); the plugin's name."""
    data = denoiser.path.read_bytes()
    sha256 = hashlib.sha256(data).hexdigest()
    options = {"threads": threads, "tile": denoiser.tile, "batch": denoiser.batch, "strength": denoiser.strength,
               "noise_sigma": denoiser.noise_sigma, "ensemble": denoiser.ensemble, "spec": denoiser.spec}
    name = plugin_name(sha256, options)
    client.register_plugin(ModelLoader(denoiser.path.name, data, sha256, options), name=name)
    return name


def _windowed(jobs: list[Job], limit: int, submit: Callable[[Job], Any]) -> Iterator[tuple[Job, Any]]:
    """Submit ``jobs`` with at most ``limit`` tasks in flight; yield each job with its result or its error."""
    from distributed import as_completed

    pending = iter(jobs)
    owner: dict[Any, Job] = {}

    def send(job: Job) -> Any:
        future = submit(job)
        owner[future] = job
        return future

    flight = as_completed([send(job) for job in itertools.islice(pending, limit)])
    for future in flight:
        job = owner.pop(future)
        try:
            outcome = future.result()
        except Exception as error:  # KilledWorker, or the task could not run at all
            outcome = error
        future.release()
        yield job, outcome
        next_job = next(pending, None)
        if next_job is not None:
            flight.add(send(next_job))


def _as_result(job: Job, outcome: Any) -> FileResult:
    return outcome if isinstance(outcome, FileResult) else _lost(job, outcome)


def _clean_up(client: Any, name: str, jobs: list[Job]) -> None:
    """Unload the model from the workers; remove dead processes' temporary files on this host."""
    with contextlib.suppress(Exception):
        client.unregister_worker_plugin(name)
    for folder in {job.output.parent for job in jobs}:
        if folder.is_dir():
            remove_stale_temporaries(folder)  # other hosts' leftovers are left alone


def denoise_on_cluster(
    client: Any,
    denoiser: OnnxDenoiser,
    jobs: list[Job],
    expected: dict[str, Any],
    *,
    threads: int = 1,
    overwrite: bool = False,
    as_float: bool = False,
    fixed_pattern: str = "auto",
    durable: bool = False,
    in_flight: int | None = None,
    progress: bool = False,
) -> Iterator[FileResult]:
    """Denoise ``jobs`` (from :func:`~grainwright.inference.runtime.batch.plan_batch`) on the cluster of
    ``client``, yielding one :class:`FileResult` per job in the order they finish.

    Parameters
    ----------
    client : distributed.Client
        A client connected to the scheduler (see :func:`connect`).
    denoiser : OnnxDenoiser
        The model and settings as loaded on the client; workers load the same bytes with the same settings.
    jobs, expected
        The plan and the expected record of :func:`~grainwright.inference.runtime.batch.plan_batch`.
    threads : int
        ONNX Runtime threads per file on the workers.
    overwrite, as_float, fixed_pattern, durable
        As for :func:`~grainwright.inference.runtime.batch.denoise_file`.
    in_flight : int, optional
        Tasks submitted and not yet finished, at most (default: ``IN_FLIGHT_PER_SLOT`` per worker thread).
    progress : bool
        Show a tqdm bar of files with done, failed and MP/s.
    """
    from distributed import KilledWorker

    name = _register_model(client, denoiser, threads)
    run = uuid.uuid4().hex[:16]  # marks this batch's outputs, to recognise one made by a worker that then died
    file_options = {"overwrite": overwrite, "as_float": as_float, "fixed_pattern": fixed_pattern,
                    "durable": durable}

    def submit(job: Job) -> Any:
        return client.submit(denoise_on_worker, name, job, expected, run, file_options, pure=False)

    window = in_flight or max(2, IN_FLIGHT_PER_SLOT * _slots(client))
    count = _Progress(len(jobs), progress)
    suspects: list[Job] = []
    try:
        for job, outcome in _windowed(jobs, window, submit):
            if isinstance(outcome, KilledWorker):
                suspects.append(job)  # perhaps only queued beside the file that kills workers: retried alone
                continue
            result = count(_as_result(job, outcome))
            yield result
            if result.fault is not None and result.fault.kind.stops_batch:
                return  # every later file would fail the same way; tasks still in flight are released
        for job, outcome in _windowed(suspects, 1, submit):
            yield count(_as_result(job, outcome))
    finally:
        count.bar.close()
        _clean_up(client, name, jobs)
