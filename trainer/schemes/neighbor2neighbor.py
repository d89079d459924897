"""``neighbor2neighbor``: self-supervision from neighbouring pixels of one noisy image (Huang et al. 2021).

Each 2x2 cell of a noisy patch ``y`` gives one pixel to each of two half-size images ``g1(y)`` and ``g2(y)``,
taken from two adjacent (horizontal or vertical) positions drawn at random per cell. Their noise is independent
and their clean contents nearly equal, so ``g2(y)`` is a Noise2Noise target for the network applied to ``g1(y)``.
The consistency regulariser corrects for the small difference of the clean contents, using the network's output
on the full image without gradient:

    L = |f(g1(y)) - g2(y)|^2 + gamma_t * |f(g1(y)) - g2(y) - (g1(f(y)) - g2(f(y)))|^2

Reference: T. Huang, S. Li, X. Jia, H. Lu, J. Liu, "Neighbor2Neighbor: Self-Supervised Denoising from Single
Noisy Images", CVPR 2021. The weight gamma_t grows linearly from 0 to ``neighbor2neighbor.gamma`` over training,
as in the authors' schedule (from memory: final value 2, the default from random weights; 1 when fine-tuning
trained weights, measured).
"""
from __future__ import annotations

import numpy as np
import torch

from grainwright.trainer.schemes.base import Scheme, apply_model

# Positions in a 2x2 cell: 0 = top-left, 1 = top-right, 2 = bottom-left, 3 = bottom-right; the 8 ordered pairs
# of adjacent positions (sharing a row or a column).
ADJACENT_PAIRS = np.array([(0, 1), (1, 0), (0, 2), (2, 0), (1, 3), (3, 1), (2, 3), (3, 2)])


def cell_values(image: torch.Tensor) -> torch.Tensor:
    """``(N, C, H, W)`` -> ``(N, C, H/2, W/2, 4)``: the four pixels of each 2x2 cell, in position order."""
    n, c, h, w = image.shape
    return image.reshape(n, c, h // 2, 2, w // 2, 2).permute(0, 1, 2, 4, 3, 5).reshape(n, c, h // 2, w // 2, 4)


def subsample(image: torch.Tensor, position: torch.Tensor) -> torch.Tensor:
    """Pick one pixel per 2x2 cell: ``position`` is ``(N, H/2, W/2)`` of indices 0..3."""
    cells = cell_values(image)
    index = position[:, None, :, :, None].expand(-1, image.shape[1], -1, -1, 1)
    return torch.gather(cells, 4, index).squeeze(4)


class Neighbor2Neighbor(Scheme):
    name = "neighbor2neighbor"
    layouts = ("noisy-only", "noisy-pairs", "noisy-stacks", "clean-noisy")
    patch_multiple = 2
    forward_passes_per_pixel = 1.75  # a forward pass on the full patch, forward and backward on a quarter of it
    default_gamma = 2.0  # Huang et al. 2021
    # Fine-tuning the starting model on gamma speckle at 10 minutes: +0.04 to +0.11 dB over 2 on 3 seeds
    # (docs/benchmarks.md); a model that already denoises needs less of the regulariser's correction.
    fine_tuning_gamma = 1.0

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        noisy = patches["noisy"]
        n, _, h, w = noisy.shape
        pair = ADJACENT_PAIRS[rng.integers(0, len(ADJACENT_PAIRS), (n, h // 2, w // 2))]
        batch = {"noisy": noisy, "first": pair[..., 0].astype(np.int64), "second": pair[..., 1].astype(np.int64)}
        level = self.noise_level(batch)
        if level is not None:
            batch["level"] = level
        return batch

    def validation_loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor]) -> torch.Tensor:
        """The reconstruction term only. The regulariser compares the network with itself (its target uses the
        same network without gradient), so it is zero for the identity and would favour it between checkpoints;
        the reconstruction term, a Noise2Noise loss, ranks denoisers correctly."""
        first = subsample(batch["noisy"], batch["first"])
        output = apply_model(model, first, batch.get("level"))
        return torch.mean((output - subsample(batch["noisy"], batch["second"])) ** 2)

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        noisy, level = batch["noisy"], batch.get("level")
        with torch.no_grad():
            full = apply_model(model, noisy, level)
        first = subsample(noisy, batch["first"])
        second = subsample(noisy, batch["second"])
        output = apply_model(model, first, level)
        reconstruction = torch.mean((output - second) ** 2)
        gap = subsample(full, batch["first"]) - subsample(full, batch["second"])
        regulariser = torch.mean((output - second - gap) ** 2)
        gamma = self.gamma_for(self.config) * min(1.0, max(0.0, progress))
        return reconstruction + gamma * regulariser
