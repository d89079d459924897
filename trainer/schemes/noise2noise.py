"""``noise2noise``: learn from pairs of independent noisy shots of the same scene.

The target is the second shot: for zero-mean noise independent between the shots, the expected squared error to
a noisy target differs from the error to the clean image by a constant, so the minimiser is the same (Lehtinen et
al. 2018, "Noise2Noise: Learning Image Restoration without Clean Data"). Which shot is input and which target is
drawn per patch, so both shots serve as inputs.
"""
from __future__ import annotations

import numpy as np
import torch

from grainwright.trainer.schemes.base import Scheme, apply_model


class Noise2Noise(Scheme):
    name = "noise2noise"
    layouts = ("noisy-pairs", "noisy-stacks")

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        swap = (rng.random(patches["noisy"].shape[0]) < 0.5)[:, None, None, None]
        batch = {"noisy": np.where(swap, patches["noisy_b"], patches["noisy"]),
                 "target": np.where(swap, patches["noisy"], patches["noisy_b"])}
        level = self.noise_level(batch)
        if level is not None:
            batch["level"] = level
        return batch

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        return torch.mean((apply_model(model, batch["noisy"], batch.get("level")) - batch["target"]) ** 2)
