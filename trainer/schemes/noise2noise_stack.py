"""``noise2noise-stack``: Noise2Noise across the frames of a still scene, for multi-frame models.

The input is a window of K frames and the target a frame outside it, K frames away (the centre of the other
window of the sample); which window is input is drawn per patch. For zero-mean noise independent between frames
the minimiser is the clean centre frame (J. Lehtinen et al., "Noise2Noise: Learning Image Restoration without
Clean Data", ICML 2018). The scene must hold still over 2K frames (a z-stack of a static part, a burst): where
it moves, the target differs from the centre frame and the model learns to blur. Noise repeated in every frame
(fixed-pattern noise) is identical in input and target, so this scheme keeps it; correct it first
(``data.fixed_pattern``) or train with ``neighbor2neighbor-stack``.
"""
from __future__ import annotations

import numpy as np
import torch

from grainwright.trainer.schemes.base import Scheme, apply_model
from grainwright.trainer.schemes.neighbor2neighbor_stack import centre_frame


class Noise2NoiseStack(Scheme):
    name = "noise2noise-stack"
    layouts = ("noisy-stacks",)
    multi_frame = True

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        swap = (rng.random(patches["noisy"].shape[0]) < 0.5)[:, None, None, None]
        return {"noisy": np.where(swap, patches["noisy_b"], patches["noisy"]),
                "other": np.where(swap, patches["noisy"], patches["noisy_b"])}

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        target = centre_frame(batch["other"], model.stack_frames)
        return torch.mean((apply_model(model, batch["noisy"]) - target) ** 2)
