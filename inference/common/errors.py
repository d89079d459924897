"""User-facing errors: each carries one line naming the file (or option) and the problem."""
from __future__ import annotations

from pathlib import Path


class GrainwrightError(Exception):
    """An error the user can act on; the command prints it on one line and exits non-zero."""


class InputError(GrainwrightError):
    """Bad input data: unreadable, wrong shape or dtype, non-finite pixels, mismatched pairs."""

    def __init__(self, path: str | Path | None, problem: str):
        self.path = None if path is None else Path(path)
        self.problem = problem
        super().__init__(f"{path}: {problem}" if path is not None else problem)


class ConfigError(GrainwrightError):
    """A configuration key, value or combination that cannot be used."""
