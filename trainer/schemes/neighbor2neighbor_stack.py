"""``neighbor2neighbor-stack``: Neighbor2Neighbor on the centre frame of a K-frame window, the neighbours as
context; all pixels in the loss, valid for moving scenes, no identity shortcut through a neighbour.

Neighbor2Neighbor (T. Huang, S. Li, X. Jia, H. Lu, J. Liu, "Neighbor2Neighbor: Self-Supervised Denoising from
Single Noisy Images", CVPR 2021) sub-samples a noisy image ``y`` twice, one pixel per 2x2 cell each, and trains
``f(g1(y))`` towards ``g2(y)``: the two sub-images hold nearly the same clean content and independent noise. Here
``y`` is a window of K frames; every frame of the window is sub-sampled at the **same** positions ``g1``, and
the target is the **centre** frame at ``g2``. The target is the centre frame itself, so the scheme does not
assume a still scene; the neighbours only add context the network may use where the scene holds still.

No identity shortcut, also for noise correlated between frames. Every frame is sampled at ``g1`` only, and ``g1``
never holds a target position: noise repeated at a pixel in every frame (a fixed pixel pattern) or correlated
between frames at the same pixel (CT slices, whose reconstruction spreads noise across slices) never reaches the
input from the target's own position, in any frame. Two pairings (``neighbor2neighbor.stack_pairing``):

- ``adjacent``, the published one: two adjacent pixels of each 2x2 cell (sharing a row or a column), drawn per
  cell. Input pixels share rows and columns with target pixels, so noise structured along rows or columns
  (banding) reaches the input through the target's own row or column (in the centre frame itself, and in every
  frame when the banding repeats). That harms single-frame Neighbor2Neighbor alike, and the trainer's row/column
  correction (``data.fixed_pattern``) removes it before training when the noise analysis flags banding.
- ``row-column-blind``: diagonal partners, one choice per patch: ``g1`` takes the pixels of rows ``2i + r`` and
  columns ``2j + c``, ``g2`` those of rows ``2i + 1 - r`` and columns ``2j + 1 - c`` (``r``, ``c`` drawn per
  patch). No input pixel, in any frame, lies in the row, the column or at the position of a target pixel, so
  banding repeated in every frame cannot be copied either (``tests/test_stack_training.py`` shows the adjacent
  pairing leaks it). The price: structure that changes from one row (or column) to the next cannot be told from
  banding and is smoothed away; on the generated conveyor sequence it cost about 3 dB (docs/benchmarks.md).

``auto`` (the trainer, ``grainwright.trainer.run.stack_pairing``) takes the row/column-blind pairing when the
noise analysis flags banding that the row/column correction did not remove (``data.fixed_pattern = "never"``),
else the adjacent one. On pure-noise stacks a model trained either way learns the mean (the tests: independent
noise, a pixel pattern repeated in every frame and noise correlated between frames with the adjacent pairing;
row, column and pixel patterns repeated in every frame with the blind one).

Why the blind pairing makes one choice per patch, not per row of cells: with ``r`` drawn afresh for each row of cells (and ``c`` for each
column), the input rows lie 1, 2 or 3 rows apart, and the spacing tells which way the target lies (a gap of 1
above row ``i`` means ``r_i = 0``: the target is below). The network learns to read that from the content (edges
and textures kinked by the uneven sampling) and to shift its output towards the target; on the evenly spaced
full-resolution frames at run time that learned shift comes out as row- and column-structured errors. On the
generated conveyor sequence this put a K = 5 model below the noisy input (docs/benchmarks.md). A regular
decimation (rows and columns exactly 2 apart in every patch) carries no such clue: the target's direction is
independent of the input, so the network learns the symmetric average.

Loss, with ``f(y)`` the network's output on the full window without gradient (the paper's regulariser, weight
growing linearly to ``neighbor2neighbor.gamma``):

    L = |f(g1(y)) - g2(y_c)|^2 + gamma_t * |f(g1(y)) - g2(y_c) - (g1(f(y)) - g2(f(y)))|^2

Windows of every second frame. Sub-sampling halves every distance in x and y, motion included: a part moving
3 pixels per frame moves 1.5 half-size pixels between the frames of a training window, and a network that learns
to use its neighbours at that displacement meets twice it at run time, on full-size consecutive frames (on the
conveyor sequence its output on the moving parts fell below the noisy input, worse the faster they moved). The
training windows therefore take every second frame (``frame_stride = 2``: frames ``i - 2r .. i + 2r``, reflected
at the ends of the stack), which doubles the displacement back: between neighbouring frames of a window the
half-size motion equals the full-size motion between consecutive frames at run time. For a still stack or a volume
whose structure runs along the stack axis there is no motion to match, and the nearer frames of consecutive
windows are better context: ``neighbor2neighbor.frame_stride = 1`` (on the generated cast volume, 32 slices of
64 x 64, 1,500 steps: 32.3 and 32.5 dB against 31.9 and 31.9 with stride 2, two training seeds).

Each training sample holds two windows of the same stack K frames apart (``noisy`` and ``noisy_b``); one of them
is drawn per patch, so every frame serves as a centre.
"""
from __future__ import annotations

from typing import Any

import numpy as np
import torch

from grainwright.trainer.schemes.base import Scheme, apply_model
from grainwright.trainer.schemes.neighbor2neighbor import ADJACENT_PAIRS


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
    each 2x2 cell, the same choice for every cell of a patch (rows ``2i + r`` and columns ``2j + c`` in, rows
    ``2i + 1 - r`` and columns ``2j + 1 - c`` out). The input rows and columns never hold a target pixel, and the
    input is a regular 2x decimation whatever ``r`` and ``c``, so it gives no clue to the target's direction."""
    row = rng.integers(0, 2, (count, 1, 1))
    col = rng.integers(0, 2, (count, 1, 1))
    rows = 2 * np.arange(height // 2)[None, :, None]
    cols = 2 * np.arange(width // 2)[None, None, :]
    first = (rows + row) * width + cols + col
    second = (rows + 1 - row) * width + cols + 1 - col
    return first.astype(np.int64), second.astype(np.int64)


def adjacent_positions(rng: np.random.Generator, count: int, height: int, width: int
                       ) -> tuple[np.ndarray, np.ndarray]:
    """Flat indices ``(count, H/2, W/2)`` of the input (``g1``) and target (``g2``) pixels of the published
    pairing: two adjacent pixels (sharing a row or a column) of each 2x2 cell, drawn per cell."""
    pair = ADJACENT_PAIRS[rng.integers(0, len(ADJACENT_PAIRS), (count, height // 2, width // 2))]
    rows = 2 * np.arange(height // 2)[None, :, None]
    cols = 2 * np.arange(width // 2)[None, None, :]
    first, second = ((rows + pair[..., k] // 2) * width + cols + pair[..., k] % 2 for k in (0, 1))
    return first.astype(np.int64), second.astype(np.int64)


PAIRINGS = {"adjacent": adjacent_positions, "row-column-blind": separated_positions}


class Neighbor2NeighborStack(Scheme):
    name = "neighbor2neighbor-stack"
    layouts = ("noisy-stacks",)
    multi_frame = True
    frame_stride = 2  # sub-sampling halves the motion in x and y; every second frame doubles it back
    patch_multiple = 2
    forward_passes_per_pixel = 1.75  # a forward pass on the full window, forward and backward on a quarter of it
    default_gamma = fine_tuning_gamma = 2.0  # Huang et al. 2021; the stack figures were measured at 2

    @classmethod
    def stride_for(cls, config: dict[str, Any]) -> int:
        return int(config["neighbor2neighbor"]["frame_stride"])

    def positions(self, rng: np.random.Generator, count: int, height: int, width: int
                  ) -> tuple[np.ndarray, np.ndarray]:
        return PAIRINGS[self.config["neighbor2neighbor"]["stack_pairing"]](rng, count, height, width)

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
        gamma = self.gamma_for(self.config) * min(1.0, max(0.0, progress))
        return reconstruction + gamma * regulariser
