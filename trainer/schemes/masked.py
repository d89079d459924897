"""``masked``: blind-spot training on single noisy images (Noise2Self / Noise2Void masking).

A few pixels of each patch are masked: their values are replaced (by a random neighbour, the mean of the four
neighbours, uniform noise or zero) and the network is scored only on predicting the original noisy value of
those pixels. For noise independent from pixel to pixel and zero-mean, the noisy value of a pixel carries no
information about its own noise once it is hidden, so the best prediction is the clean value (Batson and Royer
2019, "Noise2Self: Blind Denoising by Self-Supervision"; Krull et al. 2019, "Noise2Void - Learning Denoising from
Single Noisy Images", whose stratified sampling and random-neighbour replacement ``mask.grid`` and
``mask.replace = "neighbor"`` follow). The architecture must have no input-to-output skip, which would hand each
pixel its own noisy value back. Only the masked pixels give a gradient, which makes this scheme slow to converge
on a CPU.
"""
from __future__ import annotations

import math

import numpy as np
import torch

from grainwright.trainer.schemes.base import Scheme, apply_model

# The 24 offsets of a 5x5 neighbourhood without its centre.
NEIGHBOUR_OFFSETS = np.array([(dy, dx) for dy in range(-2, 3) for dx in range(-2, 3) if (dy, dx) != (0, 0)])


def _step(index: np.ndarray, offset: np.ndarray | int, size: int) -> np.ndarray:
    """``index + offset``, or ``index - offset`` where that would leave ``[0, size)``: the mirrored neighbour,
    never the pixel itself."""
    moved = index + offset
    return np.where((moved < 0) | (moved > size - 1), index - offset, moved)


def draw_mask(rng: np.random.Generator, count: int, height: int, width: int, fraction: float,
              grid: bool) -> np.ndarray:
    """Boolean masks ``(count, height, width)``: one pixel at a random place in each cell of edge
    ``round(1 / sqrt(fraction))`` when ``grid``, else independent pixels with probability ``fraction`` (at least
    one per patch)."""
    if grid:
        cell = max(1, round(1.0 / math.sqrt(fraction)))
        rows_n, cols_n = -(-height // cell), -(-width // cell)
        rows = np.arange(rows_n)[None, :, None] * cell + rng.integers(0, cell, (count, rows_n, cols_n))
        cols = np.arange(cols_n)[None, None, :] * cell + rng.integers(0, cell, (count, rows_n, cols_n))
        sample = np.broadcast_to(np.arange(count)[:, None, None], rows.shape)
        keep = (rows < height) & (cols < width)
        mask = np.zeros((count, height, width), dtype=bool)
        mask[sample[keep], rows[keep], cols[keep]] = True
        return mask
    mask = rng.random((count, height, width)) < fraction
    empty = ~mask.any(axis=(1, 2))
    mask[np.flatnonzero(empty), rng.integers(0, height, empty.sum()), rng.integers(0, width, empty.sum())] = True
    return mask


def replace_masked(noisy: np.ndarray, mask: np.ndarray, how: str, rng: np.random.Generator) -> np.ndarray:
    """``noisy`` ``(N, C, H, W)`` with the pixels under ``mask`` ``(N, H, W)`` replaced (all channels alike)."""
    out = noisy.copy()
    sample, rows, cols = np.nonzero(mask)
    height, width = mask.shape[1:]
    if how == "neighbor":
        offset = NEIGHBOUR_OFFSETS[rng.integers(0, len(NEIGHBOUR_OFFSETS), len(rows))]
        source = noisy[sample, :, _step(rows, offset[:, 0], height), _step(cols, offset[:, 1], width)]
    elif how == "mean":
        source = sum(noisy[sample, :, _step(rows, dy, height), _step(cols, dx, width)]
                     for dy, dx in ((-1, 0), (1, 0), (0, -1), (0, 1))) / 4.0
    elif how == "noise":
        source = rng.random((len(rows), noisy.shape[1])).astype(np.float32)
    else:
        source = 0.0
    out[sample, :, rows, cols] = source
    return out


class Masked(Scheme):
    name = "masked"
    layouts = ("noisy-only", "noisy-pairs", "noisy-stacks", "clean-noisy")
    needs_no_skip = True

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        noisy = patches["noisy"]
        settings = self.config["mask"]
        mask = draw_mask(rng, noisy.shape[0], noisy.shape[2], noisy.shape[3], settings["fraction"], settings["grid"])
        batch = {"noisy": noisy, "input": replace_masked(noisy, mask, settings["replace"], rng),
                 "mask": mask[:, None].astype(np.float32)}
        level = self.noise_level(batch)
        if level is not None:
            batch["level"] = level
        return batch

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        error = (apply_model(model, batch["input"], batch.get("level")) - batch["noisy"]) ** 2 * batch["mask"]
        return error.sum() / (batch["mask"].sum() * batch["noisy"].shape[1])
