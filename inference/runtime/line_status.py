"""Figures the line service reports: latency percentiles over a sliding window, frames per second, resident memory.

The status file (``watch-status.json`` in the output folder, rewritten atomically every few seconds) holds:

=====================  =================================================================================
key                    meaning
=====================  =================================================================================
``state``              ``running``, ``output-blocked`` (output device full or not writable: backing off),
                       ``stopping`` or ``stopped``
``pid``, ``host``      the service process
``model``              file name, ``sha256`` of the loaded model, ``changed_on_disk`` (replaced since
                       loading: reload to use it)
``frames``             ``done``, ``failed_attempts``, ``quarantined`` since the service started
``queue``              frames arrived and waiting, in memory plus still in the folder beyond the bounded
                       in-memory queue
``settling``           files seen but not yet complete (``stable`` arrival rule)
``lag_s``              seconds since the oldest waiting frame arrived (0 when nothing waits)
``latency_s``          arrival to durable output: ``p50``, ``p95``, ``p99`` over the last ``window_s``
                       seconds (``count`` frames); null when no frame finished in the window
``fps``                frames finished per second over the same window
``rss_mib``            resident memory of the process
``blocked``            the one-line reason while output is blocked, else null
``updated``            when this file was written (ISO-8601 UTC)
=====================  =================================================================================
"""
from __future__ import annotations

import os
import resource
from collections import deque
from pathlib import Path

import numpy as np

STATUS_NAME = "watch-status.json"


class LatencyWindow:
    """Latencies of the frames finished in the last ``seconds`` (at most ``limit`` of them, newest kept).

    Percentiles use linear interpolation between order statistics (numpy's default, Hyndman & Fan 1996 type 7).
    """

    def __init__(self, seconds: float = 60.0, limit: int = 10_000):
        self.seconds = float(seconds)
        self._entries: deque[tuple[float, float]] = deque(maxlen=int(limit))

    def add(self, finished: float, latency: float) -> None:
        self._entries.append((finished, latency))

    def _trim(self, now: float) -> None:
        while self._entries and self._entries[0][0] < now - self.seconds:
            self._entries.popleft()

    def summary(self, now: float, running_for: float) -> tuple[dict[str, float | int | None], float]:
        """``({p50, p95, p99, count, window_s}, frames per second)`` at wall-clock time ``now``.

        The rate divides by the window, or by ``running_for`` seconds while the service is younger than it.
        """
        self._trim(now)
        count = len(self._entries)
        figures: dict[str, float | int | None] = {"p50": None, "p95": None, "p99": None, "count": count,
                                                  "window_s": self.seconds}
        if count:
            p50, p95, p99 = np.percentile([latency for _, latency in self._entries], [50, 95, 99])
            figures.update(p50=round(float(p50), 4), p95=round(float(p95), 4), p99=round(float(p99), 4))
        span = min(self.seconds, max(running_for, 1e-9))
        return figures, count / span


def resident_mib() -> float:
    """Resident memory of this process in MiB (Linux ``/proc/self/statm``; elsewhere the peak so far)."""
    try:
        pages = int(Path("/proc/self/statm").read_text().split()[1])
        return pages * os.sysconf("SC_PAGE_SIZE") / 2**20
    except (OSError, ValueError, IndexError):
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        return peak / 2**20 if os.uname().sysname == "Darwin" else peak / 2**10
