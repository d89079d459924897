"""The data-folder layouts: which sub-folders make which layout, in the order they are tried.

One table for everything that reads a data folder (``grainwright train`` and ``grainwright inspect``). A folder
holding none of these sub-folders is read as single noisy images (``noisy-only``).
"""
from __future__ import annotations

LAYOUT_FOLDERS: dict[str, tuple[str, ...]] = {
    "clean-noisy": ("clean", "noisy"),
    "noisy-pairs": ("noisy-a", "noisy-b"),
    "noisy-stacks": ("noisy-stacks",),
    "clean-only": ("clean",),
    "noisy-only": ("noisy",),
}
