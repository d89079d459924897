"""The line service: watch a folder, denoise each frame as it arrives, never lose or duplicate one.

Behind ``grainwright watch``. One process, one model loaded once (:class:`FrameEngine`), one loop:

1. **Arrival.** The watched folder is scanned every ``poll`` seconds; a frame has arrived under the configured
   rule (:mod:`grainwright.inference.runtime.line_arrivals`: ``renamed`` or ``stable``). Arrived frames enter a
   bounded in-memory queue of paths in arrival order; beyond ``queue_limit`` they wait in the folder and are
   counted, never dropped.
2. **Work.** Each frame goes through the per-file engine of ``denoise``
   (:func:`grainwright.inference.runtime.batch.denoise_file`) with ``durable=True``: temporary file, ``fsync``,
   rename, ``fsync`` of the folder. Its output records the SHA-256 of the model that made it and of the input.
3. **Journal.** Then a ``done`` line is appended and ``fsync``ed (:mod:`.line_journal`), and only then is the
   input touched: left in place, moved to the done folder or deleted (``inputs``). A move across filesystems is
   a copy, ``fsync``, then delete.
4. **Faults** (kinds of :mod:`grainwright.inference.runtime.faults`):

   - input side (unreadable or corrupt frame, model failure, memory): retried ``retries`` times ``retry_wait``
     seconds apart, then quarantined: a one-line ``NAME.reason.txt`` in the quarantine folder, and the input
     moved there (or left in place with ``inputs="keep"``); the service goes on with the next frame;
   - output side (disk full, read-only, permission, other write error, also for the journal): one log line,
     nothing is consumed, and the same frame is retried with back-off (1, 2, 4 ... ``backoff_max`` seconds)
     until it succeeds; the service resumes by itself when space returns;
   - the model file replaced on disk: logged once; the loaded model stays until :meth:`LineService.request_reload`
     (``SIGHUP``, or ``grainwright watch ... --reload``).

Restart after a crash or ``kill -9``: stale temporary files are removed, the journal is replayed, frames whose
input is still present are redone unless an output made from the same input bytes (by SHA-256) is already on
disk, in which case it is taken over (``made: false`` in the journal), so nothing is made twice. A frame whose
attempts keep stopping the process is quarantined after ``retries`` lost attempts.

``SIGTERM``/``SIGINT``: the frame in hand is finished and journaled, the status file says ``stopped``, exit 0.

One instance per watched folder and per output folder: a lock file (``.grainwright-watch.lock``, ``flock``) in
each, naming the holder; a second instance stops with :class:`FolderHeld`.
"""
from __future__ import annotations

import contextlib
import enum
import fcntl
import json
import os
import signal
import socket
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from grainwright.inference.common.atomic import (
    move_file,
    remove_stale_temporaries,
    write_json_atomic,
    write_text_atomic,
)
from grainwright.inference.common.errors import ConfigError, GrainwrightError
from grainwright.inference.runtime.batch import read_record
from grainwright.inference.runtime.faults import Fault, FaultKind, write_fault
from grainwright.inference.runtime.frame_engine import FrameEngine
from grainwright.inference.runtime.line_arrivals import ARRIVAL_RULES, DEFAULT_PATTERNS, Arrival, ArrivalWatcher
from grainwright.inference.runtime.line_journal import JOURNAL_NAME, Journal, JournalState
from grainwright.inference.runtime.line_status import STATUS_NAME, LatencyWindow, resident_mib
from grainwright.inference.runtime.runner import file_sha256

INPUT_POLICIES = ("keep", "move", "delete")
LOCK_NAME = ".grainwright-watch.lock"
REASON_SUFFIX = ".reason.txt"


class ExitCode(enum.IntEnum):
    """Exit codes of ``grainwright watch`` (also in the command's help and the plant-machine page)."""

    STOPPED = 0  # stopped by SIGTERM/SIGINT (or idle with --exit-when-idle and nothing quarantined)
    QUARANTINED = 4  # --exit-when-idle: stopped idle, but some frames were quarantined in this run
    # (1 is left to Python itself: an unexpected error prints a traceback and exits 1)
    USAGE = 2  # bad option, unreadable model, folder missing: one line on stderr, nothing touched
    HELD = 3  # another instance holds the watched or the output folder


class FolderHeld(GrainwrightError):
    """Another service instance holds the lock of a folder."""


@dataclass
class LineSettings:
    """How the service watches, retries, touches inputs and reports. Times in seconds.

    Parameters
    ----------
    watch : Path
        The folder frames arrive in (not descended into).
    out_dir : Path
        Outputs, the journal and the status file.
    patterns : tuple of str
        Shell patterns of frame names (case-insensitive).
    arrival : {"renamed", "stable"}
        The arrival rule (:mod:`grainwright.inference.runtime.line_arrivals`); ``settle`` for ``stable``.
    poll : float
        Seconds between folder scans.
    retries, retry_wait : int, float
        Input-side failures: attempts after the first, and the pause between them.
    inputs : {"keep", "move", "delete"}
        What happens to an input once its output is durable.
    done_dir, quarantine_dir : Path, optional
        Defaults: ``done`` and ``quarantine`` inside the watched folder (never scanned as frames).
    queue_limit : int
        Frames (paths) held in memory; more wait in the folder.
    status_every, log_every : float
        Status file and one-line log periods.
    backoff_max : float
        Longest pause between retries while the output is blocked.
    window : float
        Sliding window for latency percentiles and frames per second.
    lag_warning : float
        Log when the lag first exceeds this, and again when the queue has drained.
    exit_when_idle : float, optional
        Stop once nothing has been waiting for this long (tests, catch-up runs); None runs until signalled.
    compact_after, keep_generations : int
        Journal compaction (see :mod:`grainwright.inference.runtime.line_journal`).
    """

    watch: Path
    out_dir: Path
    patterns: tuple[str, ...] = DEFAULT_PATTERNS
    arrival: str = "renamed"
    settle: float = 2.0
    poll: float = 0.2
    retries: int = 2
    retry_wait: float = 2.0
    inputs: str = "keep"
    done_dir: Path | None = None
    quarantine_dir: Path | None = None
    queue_limit: int = 1000
    status_every: float = 5.0
    log_every: float = 60.0
    backoff_max: float = 60.0
    window: float = 60.0
    lag_warning: float = 10.0
    exit_when_idle: float | None = None
    compact_after: int = 20_000
    keep_generations: int = 2

    def __post_init__(self) -> None:
        self.watch, self.out_dir = Path(self.watch), Path(self.out_dir)
        self.done_dir = Path(self.done_dir) if self.done_dir else self.watch / "done"
        self.quarantine_dir = Path(self.quarantine_dir) if self.quarantine_dir else self.watch / "quarantine"
        self.patterns = tuple(self.patterns)

    def check(self) -> None:
        """Raise ConfigError naming the first setting that cannot work."""
        if self.arrival not in ARRIVAL_RULES:
            raise ConfigError(f"--arrival must be one of {', '.join(ARRIVAL_RULES)}, got {self.arrival!r}")
        if self.inputs not in INPUT_POLICIES:
            raise ConfigError(f"--inputs must be one of {', '.join(INPUT_POLICIES)}, got {self.inputs!r}")
        if not self.patterns:
            raise ConfigError("--patterns names no pattern")
        if not self.watch.is_dir():
            raise ConfigError(f"{self.watch}: watched folder not found")
        if self.out_dir.resolve() == self.watch.resolve():
            raise ConfigError(f"{self.out_dir}: the output folder must not be the watched folder")
        for name in ("done_dir", "quarantine_dir"):
            if getattr(self, name).resolve() in (self.out_dir.resolve(), self.watch.resolve()):
                raise ConfigError(f"{getattr(self, name)}: --{name.replace('_', '-')} must be a folder of its own, "
                                  "not the watched or the output folder")
        for name in ("settle", "poll", "retry_wait", "status_every", "log_every", "backoff_max", "window"):
            if not getattr(self, name) > 0:
                raise ConfigError(f"--{name.replace('_', '-')} must be positive, got {getattr(self, name)}")
        if self.retries < 0 or self.queue_limit < 1 or self.compact_after < 10:
            raise ConfigError("--retries must be >= 0, --queue-limit >= 1, and journal compaction after >= 10 lines")
        if self.exit_when_idle is not None and not self.exit_when_idle >= 0:
            raise ConfigError(f"--exit-when-idle must be >= 0, got {self.exit_when_idle}")


class FolderLock:
    """An exclusive ``flock`` on ``FOLDER/.grainwright-watch.lock`` naming its holder (pid, host, since).

    The lock file is written in place rather than atomically: the lock belongs to its inode, which must not
    change; its text is only the holder's description. The kernel releases the lock when the process dies,
    ``kill -9`` included.
    """

    def __init__(self, folder: Path, role: str):
        self.path = Path(folder) / LOCK_NAME
        self.role = role
        self._handle: int | None = None

    def acquire(self) -> None:
        handle = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o666)
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(handle)
            raise FolderHeld(f"{self.path.parent} is already the {self.role} of another watch service "
                             f"({describe_holder(holder(self.path.parent))}); stop it first") from None
        text = json.dumps({"pid": os.getpid(), "host": socket.gethostname(), "role": self.role,
                           "since": datetime.now(timezone.utc).isoformat(timespec="seconds")}).encode()
        os.ftruncate(handle, 0)
        os.pwrite(handle, text + b"\n", 0)
        self._handle = handle

    def release(self) -> None:
        if self._handle is not None:
            with contextlib.suppress(OSError):
                os.ftruncate(self._handle, 0)
            os.close(self._handle)
            self._handle = None


def holder(folder: Path) -> dict[str, Any] | None:
    """Who holds a folder's service lock, as written in the lock file (None when unknown or free)."""
    try:
        text = (Path(folder) / LOCK_NAME).read_text()
        return json.loads(text) if text.strip() else None
    except (OSError, ValueError):
        return None


def describe_holder(found: dict[str, Any] | None) -> str:
    if not found:
        return "holder unknown"
    return f"process {found.get('pid')} on {found.get('host')} since {found.get('since')}"


def move_durably(source: Path, target: Path, *, durable: bool = True) -> Path:
    """Move ``source`` to ``target``, or to a free name beside it when taken (a copy, ``fsync`` and delete across
    filesystems: :func:`grainwright.inference.common.atomic.move_file`; ``durable`` also ``fsync``s both folders).
    Returns the final path."""
    return move_file(source, free_name(target), durable=durable)


def free_name(target: Path) -> Path:
    """``target``, or ``NAME.2``, ``NAME.3`` ... beside it when taken (a reused frame name is never overwritten)."""
    candidate, number = target, 1
    while candidate.exists():
        number += 1
        candidate = target.with_name(f"{target.name}.{number}")
    return candidate


@dataclass
class QueuedFrame:
    arrival: Arrival
    not_before: float = 0.0  # wall clock: a retry waits until then
    sha256: str = ""  # of the input bytes, once read


@dataclass
class Counters:
    done: int = 0
    taken_over: int = 0  # outputs found complete from an interrupted earlier attempt
    failed_attempts: int = 0
    quarantined: int = 0


@dataclass
class _Finished:
    """What the journal says about an input name (kept small: one per name until compaction)."""

    event: str
    size: int
    mtime_ns: int
    sha256: str
    extra: dict[str, Any] = field(default_factory=dict)


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _stamp(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, timezone.utc).isoformat(timespec="milliseconds")


def _log_to_stderr(message: str) -> None:
    import sys

    print(f"{datetime.now(timezone.utc).isoformat(timespec='seconds')} watch: {message}", file=sys.stderr,
          flush=True)


class LineService:
    """Watch a folder and denoise each frame as it arrives (see the module docstring).

    Parameters
    ----------
    open_engine : callable
        Returns a :class:`FrameEngine`; called once at start and again on each reload request.
    settings : LineSettings
    log : callable, optional
        Receives one-line messages (default: stderr with a UTC time stamp).
    clock : callable
        Wall-clock seconds (injectable for tests).
    """

    def __init__(self, open_engine: Callable[[], FrameEngine], settings: LineSettings, *,
                 log: Callable[[str], None] | None = None, clock: Callable[[], float] = time.time):
        settings.check()
        self.settings = settings
        self.open_engine = open_engine
        self.log = log or _log_to_stderr
        self.clock = clock
        self.engine: FrameEngine | None = None
        self.watcher = ArrivalWatcher(settings.watch, settings.patterns, settings.arrival, settings.settle, clock)
        self.journal = Journal(settings.out_dir / JOURNAL_NAME, compact_after=settings.compact_after,
                               keep_generations=settings.keep_generations)
        self.counters = Counters()
        self.latency = LatencyWindow(settings.window)
        self.queue: deque[QueuedFrame] = deque()
        self._queued: set[str] = set()
        self._finished: dict[str, _Finished] = {}
        self._attempts: dict[str, int] = {}
        self._last_reason: dict[str, str] = {}
        self._held_until: dict[str, float] = {}  # inputs whose done/quarantine move failed: when to try again
        self._in_folder = 0  # arrived frames beyond the in-memory queue
        self._oldest_in_folder: float | None = None
        self._blocked: str | None = None
        self._blocked_since = 0.0
        self._blocked_until = 0.0
        self._backoff = 0.0
        self._pending_done: tuple[QueuedFrame, dict[str, Any]] | None = None
        self._stop = False
        self._reload = False
        self._model_change_logged = False
        self._lagging = False
        self._locks: list[FolderLock] = []
        self._started = clock()
        self._next_scan = self._next_status = self._next_log = 0.0
        self._idle_since: float | None = None
        self._status_error: str | None = None
        self._scan_error: str | None = None

    # -- life cycle ------------------------------------------------------------------------------------------

    def open(self) -> None:
        """Take the folder locks, load the model, clean stale temporaries and replay the journal."""
        settings = self.settings
        settings.out_dir.mkdir(parents=True, exist_ok=True)
        for folder, role in ((settings.watch, "watched folder"), (settings.out_dir, "output folder")):
            lock = FolderLock(folder, role)
            try:
                lock.acquire()
            except BaseException:
                self.close()
                raise
            self._locks.append(lock)
        try:
            self.engine = self.open_engine()
            for folder in (settings.out_dir, settings.done_dir, settings.quarantine_dir):
                for path in remove_stale_temporaries(folder):
                    self.log(f"removed the unfinished temporary file {path} of a stopped run")
            state = self.journal.open()
        except BaseException:
            self.close()
            raise
        self._adopt(state)
        self.log(f"watching {settings.watch} ({settings.arrival} arrival, patterns {' '.join(settings.patterns)}) "
                 f"into {settings.out_dir} with {self.engine.path.name} (sha256 {self.engine.model_sha256[:12]}); "
                 f"inputs: {settings.inputs}; pid {os.getpid()}")

    def _adopt(self, state: JournalState) -> None:
        for name, entry in state.finished.items():
            self._finished[name] = _Finished(entry["event"], int(entry.get("size", -1)),
                                             int(entry.get("mtime_ns", -1)), str(entry.get("sha256", "")),
                                             {"kept_in_place": bool(entry.get("kept_in_place"))})
            if entry["event"] == "quarantined":
                self._last_reason[name] = str(entry.get("reason", ""))
        self._attempts = dict(state.attempts)
        if state.ignored:
            self.log(f"journal {self.journal.path}: {state.ignored} unreadable line(s) ignored (a torn last line "
                     "after a crash is expected)")
        interrupted = [name for name, count in state.attempts.items() if count]
        if interrupted:
            self.log(f"journal: {len(interrupted)} frame(s) were in flight or failed before this start; they are "
                     "checked and redone where needed")

    def close(self) -> None:
        self.journal.close()
        for lock in reversed(self._locks):
            lock.release()
        self._locks.clear()

    def request_stop(self) -> None:
        """Finish the frame in hand, then stop (what SIGTERM and SIGINT do)."""
        self._stop = True

    def request_reload(self) -> None:
        """Load the model file again before the next frame (what SIGHUP does)."""
        self._reload = True

    def run(self) -> int:
        """Open, loop until stopped, close; returns an :class:`ExitCode`. Installs SIGTERM/SIGINT/SIGHUP handlers
        when called from the main thread."""
        handlers = self._install_signals()
        try:
            self.open()
            try:
                while not self._stop:
                    self.step()
                self._write_status("stopped")
                self.log(f"stopped: done {self.counters.done}, quarantined {self.counters.quarantined}, "
                         f"{self._waiting()} waiting")
            finally:
                self.close()
        finally:
            for number, previous in handlers.items():
                signal.signal(number, previous)
        if self.settings.exit_when_idle is not None and self.counters.quarantined:
            return ExitCode.QUARANTINED
        return ExitCode.STOPPED

    def _install_signals(self) -> dict[int, Any]:
        if threading.current_thread() is not threading.main_thread():
            return {}
        previous = {}
        for number, action in ((signal.SIGTERM, self.request_stop), (signal.SIGINT, self.request_stop),
                               (signal.SIGHUP, self.request_reload)):
            previous[number] = signal.signal(number, lambda _signum, _frame, act=action: act())
        return previous

    # -- the loop ----------------------------------------------------------------------------------------------

    def step(self) -> None:
        """One pass: reload if asked, scan when due, do one frame if one is ready, report when due; sleeps a
        little when there is nothing to do."""
        now = self.clock()
        if self._reload:
            self._reload = False
            self._reload_model()
        if now >= self._next_scan:
            self._scan()
            self._next_scan = now + self.settings.poll
        worked = False
        if now >= self._blocked_until:
            if self._pending_done is not None:
                self._commit_done(*self._pending_done)
                worked = True
            else:
                frame = self._next_ready(now)
                if frame is not None and not self._stop:
                    self._process(frame)
                    worked = True
        now = self.clock()
        if now >= self._next_status:
            self._check_model_file()
            self._write_status("stopping" if self._stop else None)
            self._next_status = now + self.settings.status_every
        if now >= self._next_log:
            if self._next_log:
                self.log(self._summary_line(now))
            self._next_log = now + self.settings.log_every
        self._watch_lag(now)
        self._check_idle(now, worked)
        if not worked and not self._stop:
            self._pause(now)

    def _pause(self, now: float) -> None:
        wake = min(self._next_scan, self._next_status)
        if self._blocked:
            wake = min(wake, self._blocked_until)
        ready = [frame.not_before for frame in self.queue]
        if ready and now >= self._blocked_until:
            wake = min(wake, min(ready))
        time.sleep(min(self.settings.poll, max(0.0, wake - now)))

    def _check_idle(self, now: float, worked: bool) -> None:
        if self.settings.exit_when_idle is None:
            return
        busy = worked or self._waiting() or self._blocked or self._pending_done or self.watcher.waiting()
        if busy:
            self._idle_since = None
        elif self._idle_since is None:
            self._idle_since = now
        elif now - self._idle_since >= self.settings.exit_when_idle:
            self._stop = True

    def _waiting(self) -> int:
        return len(self.queue) + self._in_folder

    # -- arrivals ----------------------------------------------------------------------------------------------

    def _scan(self) -> None:
        try:
            arrivals = self.watcher.scan()
        except OSError as error:
            reason = f"cannot read the watched folder {self.settings.watch}: {error.strerror or error}"
            if reason != self._scan_error:
                self.log(reason)
            self._scan_error = reason
            return
        if self._scan_error:
            self.log(f"the watched folder {self.settings.watch} is readable again")
            self._scan_error = None
        now = self.clock()
        fresh = [arrival for arrival in arrivals
                 if arrival.name not in self._queued and not self._settled(arrival, now)]
        room = self.settings.queue_limit - len(self.queue)
        for arrival in fresh[:max(room, 0)]:
            self.queue.append(QueuedFrame(arrival))
            self._queued.add(arrival.name)
        beyond = fresh[max(room, 0):]
        self._in_folder = len(beyond)
        self._oldest_in_folder = beyond[0].arrived if beyond else None

    def _settled(self, arrival: Arrival, now: float) -> bool:
        """Nothing to do for this file now: finished and left in place, or its input move is being retried."""
        if self._held_until.get(arrival.name, 0.0) > now:
            return True
        known = self._finished.get(arrival.name)
        if known is None or (known.size, known.mtime_ns) != (arrival.size, arrival.mtime_ns):
            return False
        return self.settings.inputs == "keep" or known.event == "quarantined" and self._kept_in_place(arrival.name)

    def _kept_in_place(self, name: str) -> bool:
        return bool(self._finished[name].extra.get("kept_in_place"))

    def _next_ready(self, now: float) -> QueuedFrame | None:
        for frame in self.queue:
            if frame.not_before <= now:
                return frame
        return None

    def _dequeue(self, frame: QueuedFrame) -> None:
        with contextlib.suppress(ValueError):
            self.queue.remove(frame)
        self._queued.discard(frame.arrival.name)

    # -- one frame ---------------------------------------------------------------------------------------------

    def _process(self, frame: QueuedFrame) -> None:
        engine, settings = self.engine, self.settings
        arrival = frame.arrival
        name, source = arrival.name, arrival.path
        try:
            stat = os.stat(source)
            sha256 = file_sha256(source)
        except FileNotFoundError:
            self.log(f"{source}: vanished before it was read; nothing to do")
            self._dequeue(frame)
            return
        except OSError as error:
            self._input_failure(frame, Fault(FaultKind.INPUT, source, f"cannot read: {error.strerror or error}"))
            return
        arrival = Arrival(source, stat.st_size, stat.st_mtime_ns, arrival.arrived)
        frame.arrival, frame.sha256 = arrival, sha256
        known = self._finished.get(name)
        if known is not None and known.sha256 == sha256:
            # journaled before the service stopped: only the input's move or delete may be left to do
            if known.event == "done":
                self._finished[name] = _Finished("done", stat.st_size, stat.st_mtime_ns, sha256)
                self._dispose_input(frame, settings.inputs, settings.done_dir, "done")
            else:
                self._quarantine(frame, self._last_reason.get(name, "quarantined before the service stopped"),
                                 journal=False)
            return
        output = settings.out_dir / engine.output_name(name)
        if output.exists():
            record = read_record(output)
            if record is not None and record.get("source_sha256") == sha256:
                entry = self._done_entry(arrival, sha256, output, record.get("model_sha256"), made=False, seconds=0.0)
                self._commit_done(frame, entry)
            else:
                self._quarantine(frame, f"the output {output} already exists and was not made from this file "
                                 "(frame names must be unique); it is kept")
            return
        attempts = self._attempts.get(name, 0)
        if attempts > settings.retries:
            last = self._last_reason.get(name, "the service stopped during each attempt")
            self._quarantine(frame, f"gave up after {attempts} attempts ({last})")
            return
        try:
            self.journal.append({"event": "start", "input": name, "size": stat.st_size, "sha256": sha256})
        except OSError as error:
            self._output_blocked(write_fault(error, self.journal.path))
            return
        extra = {"source_sha256": sha256, "arrived": _stamp(arrival.arrived), "service": "watch",
                 "host": socket.gethostname(), "pid": os.getpid()}
        result = engine.denoise_file(source, output, durable=True, extra_record=extra)
        if result.status in ("done", "skipped"):
            for note in result.warnings:
                self.log(f"warning: {source}: {note}")
            self._commit_done(frame, self._done_entry(arrival, sha256, output, engine.model_sha256, made=True,
                                                      seconds=result.seconds))
        elif result.fault.kind.output_side:
            self._journal_retry(name, result.fault)
            self._output_blocked(result.fault)
        else:
            self._journal_retry(name, result.fault)
            self._input_failure(frame, result.fault)

    def _done_entry(self, arrival: Arrival, sha256: str, output: Path, model_sha256: str | None, *, made: bool,
                    seconds: float) -> dict[str, Any]:
        return {"event": "done", "input": arrival.name, "size": arrival.size, "mtime_ns": arrival.mtime_ns,
                "sha256": sha256, "output": output.name, "model_sha256": model_sha256, "made": made,
                "arrived": _stamp(arrival.arrived), "seconds": round(seconds, 4)}

    def _commit_done(self, frame: QueuedFrame, entry: dict[str, Any]) -> None:
        finished = self.clock()
        latency = max(0.0, finished - frame.arrival.arrived)
        entry["latency_s"] = round(latency, 4)
        try:
            self.journal.append(entry, durable=True)
        except OSError as error:
            self._pending_done = (frame, entry)
            self._output_blocked(write_fault(error, self.journal.path))
            return
        self._pending_done = None
        self._unblocked()
        name = entry["input"]
        self._finished[name] = _Finished("done", entry["size"], entry["mtime_ns"], entry["sha256"])
        self._attempts.pop(name, None)
        self._last_reason.pop(name, None)
        self.counters.done += 1
        self.counters.taken_over += 0 if entry["made"] else 1
        self.latency.add(finished, latency)
        self._dispose_input(frame, self.settings.inputs, self.settings.done_dir, "done")
        if self.journal.needs_compaction():
            self._compact()

    def _dispose_input(self, frame: QueuedFrame, policy: str, folder: Path, label: str) -> None:
        """Apply an input policy once the outcome is durable; a failure leaves the input where it is.

        The folders are not ``fsync``ed here: the outcome is already in the journal, so a move or delete lost in a
        power cut only brings the input back, and the restart finishes the move or delete without redoing it.
        """
        source = frame.arrival.path
        self._dequeue(frame)
        try:
            if policy == "move":
                move_durably(source, folder / source.name, durable=False)
            elif policy == "delete":
                os.unlink(source)
        except FileNotFoundError:
            pass
        except OSError as error:
            self._held_until[source.name] = self.clock() + self.settings.backoff_max
            self.log(f"{source}: {label}, but the input could not be {'moved' if policy == 'move' else 'deleted'} "
                     f"({error.strerror or error}); it stays in the watched folder, is not redone, and the "
                     f"{policy} is retried later")
            return
        self._held_until.pop(source.name, None)

    def _journal_retry(self, name: str, fault: Fault) -> None:
        with contextlib.suppress(OSError):  # a journal on a full disk: the attempt is redone anyway
            self.journal.append({"event": "retry", "input": name, "kind": fault.kind.value,
                                 "reason": _one_line(str(fault))})

    def _input_failure(self, frame: QueuedFrame, fault: Fault) -> None:
        name = frame.arrival.name
        self.counters.failed_attempts += 1
        attempts = self._attempts.get(name, 0) + 1
        self._attempts[name] = attempts
        self._last_reason[name] = fault.reason
        if attempts > self.settings.retries:
            self._quarantine(frame, _one_line(fault.reason))
            return
        self.log(f"attempt {attempts} failed ({fault.kind.value}): {fault}; retrying in "
                 f"{self.settings.retry_wait:g} s")
        frame.not_before = self.clock() + self.settings.retry_wait

    def _quarantine(self, frame: QueuedFrame, reason: str, *, journal: bool = True) -> None:
        """Give a frame up: the reason beside it in the quarantine folder, the input moved there (or kept)."""
        settings, arrival = self.settings, frame.arrival
        reason = _one_line(reason)
        kept = settings.inputs == "keep"
        try:
            if journal:
                write_text_atomic(free_name(settings.quarantine_dir / (arrival.name + REASON_SUFFIX)),
                                  f"{arrival.name}: {reason}\n", durable=True)
                self.journal.append({"event": "quarantined", "input": arrival.name, "size": arrival.size,
                                     "mtime_ns": arrival.mtime_ns, "sha256": frame.sha256, "reason": reason,
                                     "kept_in_place": kept}, durable=True)
        except OSError as error:
            frame.not_before = self.clock() + self.settings.backoff_max
            self.log(f"{arrival.path}: cannot quarantine ({error.strerror or error}); trying again later")
            return
        self._finished[arrival.name] = _Finished("quarantined", arrival.size, arrival.mtime_ns, frame.sha256,
                                                 {"kept_in_place": kept})
        self._attempts.pop(arrival.name, None)
        if journal:
            self.counters.quarantined += 1
            self.log(f"quarantined {arrival.path}: {reason}")
        self._dispose_input(frame, "keep" if kept else "move", settings.quarantine_dir, "quarantined")

    # -- output faults -----------------------------------------------------------------------------------------

    def _output_blocked(self, fault: Fault) -> None:
        now = self.clock()
        self._backoff = min(self.settings.backoff_max, max(1.0, self._backoff * 2))
        if self._blocked is None:
            self._blocked_since = now
            self.log(f"output blocked ({fault.kind.value}): {fault}; nothing is lost, retrying with back-off "
                     f"(up to {self.settings.backoff_max:g} s) until it can write again")
        self._blocked = _one_line(str(fault))
        self._blocked_until = now + self._backoff
        self._write_status(None)

    def _unblocked(self) -> None:
        if self._blocked is not None:
            self.log(f"output writable again after {self.clock() - self._blocked_since:.0f} s; resuming")
        self._blocked, self._backoff, self._blocked_until = None, 0.0, 0.0

    # -- model -------------------------------------------------------------------------------------------------

    def _check_model_file(self) -> None:
        if self.engine is None or self._model_change_logged or not self.engine.model_file_changed():
            return
        self._model_change_logged = True
        self.log(f"the model file {self.engine.path} changed on disk; still running the loaded model (sha256 "
                 f"{self.engine.model_sha256[:12]}); send SIGHUP (or run 'grainwright watch ... --reload') to load it")

    def _reload_model(self) -> None:
        try:
            engine = self.open_engine()
        except (GrainwrightError, OSError) as error:
            self.log(f"reload failed, keeping the loaded model (sha256 {self.engine.model_sha256[:12]}): "
                     f"{_one_line(str(error))}")
            return
        previous, self.engine = self.engine, engine
        self._model_change_logged = False
        self.log(f"reloaded {engine.path.name}: sha256 {previous.model_sha256[:12]} -> {engine.model_sha256[:12]}")

    # -- reporting ---------------------------------------------------------------------------------------------

    def lag(self, now: float | None = None) -> float:
        """Seconds since the oldest waiting frame arrived (0 when nothing waits)."""
        now = self.clock() if now is None else now
        oldest = [frame.arrival.arrived for frame in self.queue]
        if self._oldest_in_folder is not None:
            oldest.append(self._oldest_in_folder)
        return max(0.0, now - min(oldest)) if oldest else 0.0

    def status(self, state: str | None = None) -> dict[str, Any]:
        now = self.clock()
        latency, fps = self.latency.summary(now, now - self._started)
        engine = self.engine
        return {
            "state": state or ("output-blocked" if self._blocked else "running"),
            "pid": os.getpid(), "host": socket.gethostname(),
            "watch": str(self.settings.watch), "out_dir": str(self.settings.out_dir),
            "model": {"file": engine.path.name if engine else None,
                      "sha256": engine.model_sha256 if engine else None,
                      "changed_on_disk": bool(engine and engine.model_file_changed())},
            "frames": {"done": self.counters.done, "taken_over": self.counters.taken_over,
                       "failed_attempts": self.counters.failed_attempts, "quarantined": self.counters.quarantined},
            "queue": {"in_memory": len(self.queue), "in_folder": self._in_folder, "total": self._waiting()},
            "settling": self.watcher.waiting(),
            "lag_s": round(self.lag(now), 3),
            "latency_s": latency,
            "fps": round(fps, 3),
            "rss_mib": round(resident_mib(), 1),
            "blocked": self._blocked,
            "started": _stamp(self._started),
            "updated": _stamp(now),
        }

    def _write_status(self, state: str | None) -> None:
        try:
            write_json_atomic(self.settings.out_dir / STATUS_NAME, self.status(state))
        except OSError as error:
            reason = f"cannot write the status file: {error.strerror or error}"
            if reason != self._status_error:
                self.log(reason)
            self._status_error = reason
            return
        self._status_error = None

    def _summary_line(self, now: float) -> str:
        latency, fps = self.latency.summary(now, now - self._started)
        percentiles = "-" if latency["p50"] is None else \
            f"{latency['p50']:.2f}/{latency['p95']:.2f}/{latency['p99']:.2f} s"
        blocked = f", OUTPUT BLOCKED: {self._blocked}" if self._blocked else ""
        return (f"done {self.counters.done}, quarantined {self.counters.quarantined}, failed attempts "
                f"{self.counters.failed_attempts}, queue {self._waiting()}, lag {self.lag(now):.1f} s, latency "
                f"p50/p95/p99 {percentiles}, {fps:.2f} frames/s, rss {resident_mib():.0f} MiB{blocked}")

    def _watch_lag(self, now: float) -> None:
        lag = self.lag(now)
        if not self._lagging and lag > self.settings.lag_warning:
            self._lagging = True
            self.log(f"falling behind: {self._waiting()} frame(s) waiting, lag {lag:.1f} s (nothing is dropped)")
        elif self._lagging and not self._waiting():
            self._lagging = False
            self.log("caught up: the queue is empty")

    def _compact(self) -> None:
        present = {arrival.name for arrival in self._safe_listing()}
        keep = []
        for name in sorted(present & self._finished.keys()):
            known = self._finished[name]
            keep.append({"event": known.event, "input": name, "size": known.size, "mtime_ns": known.mtime_ns,
                         "sha256": known.sha256, "carried": True, **known.extra})
        for name, count in self._attempts.items():
            keep.extend({"event": "retry", "input": name, "kind": "input", "carried": True} for _ in range(count))
        try:
            self.journal.compact(keep)
        except OSError as error:
            self.log(f"journal compaction failed ({error.strerror or error}); the journal keeps growing until it "
                     "succeeds")
            return
        self._finished = {name: self._finished[name] for name in present & self._finished.keys()}
        self.log(f"journal compacted: {len(keep)} entries carried over, older generations kept beside it")

    def _safe_listing(self) -> list[Arrival]:
        try:
            return ArrivalWatcher(self.settings.watch, self.settings.patterns, "renamed").scan()
        except OSError:
            return []
