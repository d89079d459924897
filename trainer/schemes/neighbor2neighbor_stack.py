"""``neighbor2neighbor-stack``: Neighbor2Neighbor on the centre frame of a K-frame window, the neighbours as
context; all pixels in the loss, valid for moving scenes, no identity shortcut through a neighbour.

Neighbor2Neighbor (T. Huang, S. Li, X. Jia, H. Lu, J. Liu, "Neighbor2Neighbor: Self-Supervised Denoising from
Single Noisy Images", CVPR 2021) sub-samples a noisy image ``y`` twice, one pixel per 2x2 cell each, and trains
``f(g1(y))`` towards ``g2(y)``: the two sub-images hold nearly the same clean content and independent noise. Here
``y`` is a window of K frames; every frame of the window is sub-sampled at the **same** positions ``g1``, and
the target is the **centre** frame at ``g2``. The target is the centre frame itself, so the scheme does not
assume a still scene; the neighbours only add context the network may use where the scene holds still.

No identity shortcut, also for noise correlated between frames. Within each 2x2 cell, ``g1`` and ``g2`` take
diagonal partners, and the row chosen for ``g1`` is the same along a whole row of cells (likewise the column
along a column of cells). So no pixel of the input, in any frame, lies in the row, the column or at the position
of a target pixel. Noise shared by the frames of a stack, at a fixed position (fixed-pattern noise repeated in
every frame, correlated CT slices) or along a row or column (banding), therefore never reaches the input from the
target's own row, column or pixel: the network cannot learn to reproduce it, and on pure noise it learns the mean.
(The published pairing takes adjacent pixels chosen per cell, so targets share a row or a column with input
pixels; ``tests/test_stack_training.py`` shows that this leaks repeated banding.)

Loss, with ``f(y)`` the network's output on the full window without gradient (the paper's regulariser, weight
growing linearly to ``neighbor2neighbor.gamma``):

    L = |f(g1(y)) - g2(y_c)|^2 + gamma_t * |f(g1(y)) - g2(y_c) - (g1(f(y)) - g2(f(y)))|^2

Each training sample holds two windows of the same stack K frames apart (``noisy`` and ``noisy_b``); one of them
is drawn per patch, so every frame serves as a centre.
"""
from __future__ import annotations

import numpy as np
import torch

from grainwright.trainer.schemes.base import Scheme, apply_model


def pick(image: torch.Tensor, positions: torch.Tensor) -> torch.Tensor:
    """``(N, C, H, W)`` at ``positions`` ``(N, H/2, W/2)`` (flat indices into H x W) -> ``(N, C, H/2, W/2)``."""
    n, c = image.shape[:2]
    index = positions.reshape(n, 1, -1).expand(-1, c, -1)
    return torch.gather(image.reshape(n, c, -1), 2, index).reshape(n, c, *positions.shape[1:])


def centre_frame(window: torch.Tensor, frames: int) -> torch.Tensor:
    """The centre frame's channels of a frame-major ``(N, K * C, H, W)`` window."""
    channels = window.shape[1] // frames
    first = (frames // 2) * channels
    return window[:, first:first + channels]


def separated_positions(rng: np.random.Generator, count: int, height: int, width: int
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Flat indices ``(count, H/2, W/2)`` of the input (``g1``) and target (``g2``) pixels: diagonal partners in
    each 2x2 cell, with one row choice per row of cells and one column choice per column of cells, so that the
    input rows and columns never hold a target pixel."""
    row = rng.integers(0, 2, (count, height // 2))
    col = rng.integers(0, 2, (count, width // 2))
    rows = 2 * np.arange(height // 2)[None, :]
    cols = 2 * np.arange(width // 2)[None, :]
    first = (rows + row)[:, :, None] * width + (cols + col)[:, None, :]
    second = (rows + 1 - row)[:, :, None] * width + (cols + 1 - col)[:, None, :]
    return first.astype(np.int64), second.astype(np.int64)


class Neighbor2NeighborStack(Scheme):
    name = "neighbor2neighbor-stack"
    layouts = ("noisy-stacks",)
    multi_frame = True
    patch_multiple = 2
    forward_passes_per_pixel = 1.75  # a forward pass on the full window, forward and backward on a quarter of it

    def positions(self, rng: np.random.Generator, count: int, height: int, width: int
                  ) -> tuple[np.ndarray, np.ndarray]:
        return separated_positions(rng, count, height, width)

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        n, _, h, w = patches["noisy"].shape
        other = (rng.random(n) < 0.5)[:, None, None, None]
        first, second = self.positions(rng, n, h, w)
        return {"noisy": np.where(other, patches["noisy_b"], patches["noisy"]), "first": first, "second": second}

    def _terms(self, model: torch.nn.Module, batch: dict[str, torch.Tensor]) -> tuple[torch.Tensor, torch.Tensor]:
        window, first = batch["noisy"], batch["first"]
        output = apply_model(model, pick(window, first))
        target = pick(centre_frame(window, model.stack_frames), batch["second"])
        return output, target

    def validation_loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor]) -> torch.Tensor:
        """The reconstruction term only (the regulariser is zero for the identity, see ``neighbor2neighbor``)."""
        output, target = self._terms(model, batch)
        return torch.mean((output - target) ** 2)

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        with torch.no_grad():
            full = apply_model(model, batch["noisy"])
        output, target = self._terms(model, batch)
        reconstruction = torch.mean((output - target) ** 2)
        gap = pick(full, batch["first"]) - pick(full, batch["second"])
        regulariser = torch.mean((output - target - gap) ** 2)
        gamma = self.config["neighbor2neighbor"]["gamma"] * min(1.0, max(0.0, progress))
        return reconstruction + gamma * regulariser
