"""When a frame dropped into a watched folder counts as arrived (complete and safe to read).

A poller cannot tell a file renamed into the folder from one still being written in place, and change
notifications miss writes made over network shares, so the rule is a setting:

``renamed``
    The writer writes under a temporary name that the patterns do not match (for example ``frame.tif.part`` or a
    hidden name) and renames it into place when complete; a rename is atomic, so a matching name is complete as
    soon as it is seen.
``stable``
    The writer writes in place. A file has arrived once its size and modification time have stayed unchanged,
    as seen by successive scans, for ``settle`` seconds (and it is not empty). Works on network shares; costs
    ``settle`` seconds of latency per frame. Choose ``settle`` above the longest pause of the writer.

Hidden names (leading dot, which covers grainwright's own temporary files and locks) and sub-folders are never
frames.
"""
from __future__ import annotations

import fnmatch
import os
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

ARRIVAL_RULES = ("renamed", "stable")
DEFAULT_PATTERNS = ("*.tif", "*.tiff", "*.png", "*.npy")


@dataclass(frozen=True)
class Arrival:
    """A complete frame in the watched folder."""

    path: Path
    size: int
    mtime_ns: int
    arrived: float  # wall-clock seconds since the epoch: our best estimate of when the frame was complete

    @property
    def name(self) -> str:
        return self.path.name


def matches(name: str, patterns: Iterable[str]) -> bool:
    """Whether a file name is a frame: not hidden, and matching one of the shell patterns (case-insensitive)."""
    if name.startswith("."):
        return False
    lowered = name.lower()
    return any(fnmatch.fnmatchcase(lowered, pattern.lower()) for pattern in patterns)


class ArrivalWatcher:
    """Scans one folder and reports the frames that have arrived under the chosen rule.

    Parameters
    ----------
    folder : Path
        The watched folder (not descended into).
    patterns : sequence of str
        Shell patterns of frame names, e.g. ``("*.tif",)``; matched case-insensitively.
    rule : {"renamed", "stable"}
        See the module docstring.
    settle : float
        ``stable`` only: seconds a file's size and modification time must stay unchanged.
    clock : callable
        Wall-clock seconds (injectable for tests).
    """

    def __init__(self, folder: Path, patterns: Iterable[str], rule: str = "renamed", settle: float = 2.0,
                 clock: Callable[[], float] = time.time):
        if rule not in ARRIVAL_RULES:
            raise ValueError(f"arrival rule must be one of {ARRIVAL_RULES}, got {rule!r}")
        self.folder = Path(folder)
        self.patterns = tuple(patterns)
        self.rule = rule
        self.settle = float(settle)
        self.clock = clock
        # name -> (size, mtime_ns, wall time this state was first seen); pruned to the folder's content each scan
        self._seen: dict[str, tuple[int, int, float]] = {}

    def scan(self) -> list[Arrival]:
        """Every frame in the folder that has arrived, oldest first. Raises OSError when the folder is unreadable."""
        now = self.clock()
        present: dict[str, tuple[int, int, float]] = {}
        arrivals: list[Arrival] = []
        with os.scandir(self.folder) as entries:
            for entry in entries:
                if not matches(entry.name, self.patterns):
                    continue
                try:
                    if not entry.is_file(follow_symlinks=True):
                        continue
                    stat = entry.stat(follow_symlinks=True)
                except OSError:  # gone between listing and stat: renamed away or deleted
                    continue
                state = (stat.st_size, stat.st_mtime_ns)
                previous = self._seen.get(entry.name)
                since = previous[2] if previous is not None and previous[:2] == state else now
                present[entry.name] = (*state, since)
                if self.rule == "renamed":
                    # the rename changed the ctime: when it landed here (capped by our own clock, for skewed shares)
                    arrivals.append(Arrival(Path(entry.path), stat.st_size, stat.st_mtime_ns,
                                            min(since, stat.st_ctime)))
                elif stat.st_size > 0 and now - since >= self.settle:
                    arrivals.append(Arrival(Path(entry.path), stat.st_size, stat.st_mtime_ns,
                                            min(since, stat.st_mtime)))
        self._seen = present
        arrivals.sort(key=lambda arrival: (arrival.arrived, arrival.name))
        return arrivals

    def waiting(self) -> int:
        """Frames seen in the last scan that have not yet settled (``stable`` rule)."""
        if self.rule == "renamed":
            return 0
        now = self.clock()
        return sum(1 for size, _, since in self._seen.values() if size == 0 or now - since < self.settle)
