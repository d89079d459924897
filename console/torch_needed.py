"""Check for PyTorch without importing it, so the torch-free half stays torch-free."""
from __future__ import annotations

import importlib.util

from grainwright.inference.common.errors import GrainwrightError


def require_torch(command: str) -> None:
    """Raise a clear error when ``command`` needs PyTorch and it is not installed."""
    try:
        installed = importlib.util.find_spec("torch") is not None
    except ImportError:  # a finder that refuses torch outright
        installed = False
    if not installed:
        raise GrainwrightError(
            f"'grainwright {command}' needs PyTorch, which is not installed here "
            "(the runtime-only install has no torch). Install the training extra: "
            "pip install -c constraints.txt 'grainwright[train]'"
        )
