"""The line service's journal: one JSON line per event, appended whole, replayed on restart.

Events (every line has ``event``, ``input`` (the file name) and ``time``, an ISO-8601 UTC stamp):

``start``
    An attempt at a frame begins (``size``, ``sha256``). A start with nothing after it for that frame means the
    service stopped during the attempt (crash, ``kill -9``, power cut); the restart redoes the frame and counts the
    lost attempt, so a frame that brings the process down every time is quarantined after the retries.
``done``
    The output is durable (``output``, ``model_sha256`` of the model that made it, ``made``: false when an output
    already on disk from an interrupted attempt was taken over, ``latency_s`` from arrival to durable output,
    ``seconds`` of processing, ``size``, ``mtime_ns``, ``sha256`` of the input).
``retry``
    An attempt failed (``kind`` of fault and one-line ``reason``); output-side faults do not count as attempts.
``quarantined``
    The frame was given up (``reason``); its input was moved to the quarantine folder or, when inputs stay in
    place, recorded there.

Durability: appends are single ``write`` calls of whole lines on a file opened for appending, ``fsync``ed for
``done`` and ``quarantined``. A write that fails part-way (disk full) is cut back to the last whole line at once,
and again before the next append if that cut failed; a torn last line left by a crash is ignored on replay and cut
off when the journal is reopened.

Bounded size: past ``compact_after`` lines the journal is compacted: the current file becomes generation 1
(older generations shift up, the oldest beyond ``keep_generations`` is deleted) and a new journal holding only the
entries still needed (frames whose inputs are still in the watched folder) replaces it atomically.
"""
from __future__ import annotations

import contextlib
import json
import os
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from grainwright.inference.common.atomic import move_file, write_bytes_atomic, write_text_atomic

JOURNAL_NAME = "watch-journal.jsonl"
TERMINAL_EVENTS = ("done", "quarantined")
INPUT_SIDE_KINDS = ("input", "model", "memory")


def utc_stamp() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds")


@dataclass
class JournalState:
    """What a replay of the journal says: the last terminal entry per input name and the attempts so far."""

    finished: dict[str, dict[str, Any]] = field(default_factory=dict)  # name -> its last done/quarantined line
    attempts: dict[str, int] = field(default_factory=dict)  # name -> failed or interrupted attempts since then
    lines: int = 0
    ignored: int = 0  # unreadable lines (a torn last line after a crash)


def replay(lines: Iterable[str]) -> JournalState:
    """Rebuild the state from journal lines; unreadable lines are counted and skipped."""
    state = JournalState()
    in_flight: set[str] = set()
    for line in lines:
        state.lines += 1
        try:
            entry = json.loads(line)
            name, event = entry["input"], entry["event"]
        except (ValueError, KeyError, TypeError):
            state.ignored += 1
            continue
        if event == "start":
            if name in in_flight:  # the previous attempt never finished: the process stopped during it
                state.attempts[name] = state.attempts.get(name, 0) + 1
            in_flight.add(name)
        elif event == "retry":
            in_flight.discard(name)
            if entry.get("kind") in INPUT_SIDE_KINDS:
                state.attempts[name] = state.attempts.get(name, 0) + 1
        elif event in TERMINAL_EVENTS:
            in_flight.discard(name)
            state.attempts.pop(name, None)
            state.finished[name] = entry
    for name in in_flight:
        state.attempts[name] = state.attempts.get(name, 0) + 1
    return state


class Journal:
    """Append-only JSON-lines journal in the output folder (see the module docstring).

    Parameters
    ----------
    path : Path
        The journal file.
    compact_after : int
        Lines after which :meth:`needs_compaction` says yes.
    keep_generations : int
        Older journals kept beside it (``NAME.1.jsonl`` newest), for tracing; 0 keeps none.
    """

    def __init__(self, path: Path, *, compact_after: int = 20_000, keep_generations: int = 2):
        self.path = Path(path)
        self.compact_after = int(compact_after)
        self.keep_generations = int(keep_generations)
        self._handle: int | None = None
        self._good_size = 0
        self.lines = 0

    def open(self) -> JournalState:
        """Replay the journal (creating it when missing), cut off a torn last line, and open it for appending."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        data = self.path.read_bytes() if self.path.exists() else b""
        whole = data[: data.rfind(b"\n") + 1]
        state = replay(whole.decode("utf-8", errors="replace").splitlines())
        if len(whole) != len(data):
            state.ignored += 1
        self._handle = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o666)
        self._good_size = len(whole)
        self._cut_back()
        self.lines = state.lines
        return state

    def close(self) -> None:
        if self._handle is not None:
            os.close(self._handle)
            self._handle = None

    def _cut_back(self) -> None:
        """Drop anything after the last whole line (a torn line from a crash or a failed append)."""
        if os.fstat(self._handle).st_size != self._good_size:
            os.ftruncate(self._handle, self._good_size)

    def append(self, entry: dict[str, Any], *, durable: bool = False) -> None:
        """Append one entry as a whole line (``time`` added when missing). Raises OSError on failure (the
        journal is left ending with a whole line whenever the operating system allows)."""
        if self._handle is None:
            raise RuntimeError("journal is not open")
        entry = {"time": utc_stamp(), **entry}
        line = (json.dumps(entry, separators=(",", ":"), default=str) + "\n").encode("utf-8")
        self._cut_back()
        try:
            written = os.write(self._handle, line)
            if written != len(line):
                raise OSError(28, "No space left on device (short write to the journal)")
            if durable:
                os.fsync(self._handle)
        except OSError:
            with contextlib.suppress(OSError):
                self._cut_back()
            raise
        self._good_size += len(line)
        self.lines += 1

    def needs_compaction(self) -> bool:
        return self.lines >= self.compact_after

    def generation(self, number: int) -> Path:
        return self.path.with_name(f"{self.path.stem}.{number}{self.path.suffix}")

    def compact(self, keep: Iterable[dict[str, Any]]) -> None:
        """Rotate the journal and start a new one holding only ``keep`` (entries still needed on restart).

        Crash-safe: generation 1 is a hard link (or copy) of the current journal made before the new journal
        replaces it atomically, so at every moment the journal name holds a complete journal.
        """
        text = "".join(json.dumps(entry, separators=(",", ":"), default=str) + "\n" for entry in keep)
        if self.keep_generations > 0:
            self._shift_generations()
        write_text_atomic(self.path, text, durable=True)
        self.close()
        self._handle = os.open(self.path, os.O_WRONLY | os.O_APPEND)
        self._good_size = os.fstat(self._handle).st_size
        self.lines = text.count("\n")

    def _shift_generations(self) -> None:
        with contextlib.suppress(FileNotFoundError):
            self.generation(self.keep_generations).unlink()
        for number in range(self.keep_generations - 1, 0, -1):
            with contextlib.suppress(FileNotFoundError):
                move_file(self.generation(number), self.generation(number + 1), durable=False)
        try:
            os.link(self.path, self.generation(1))
        except OSError:  # no hard links on this filesystem: a copy, written atomically
            write_bytes_atomic(self.generation(1), self.path.read_bytes(), durable=True)
