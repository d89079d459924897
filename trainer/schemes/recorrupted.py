"""``recorrupted``: Recorrupted-to-Recorrupted training on single noisy images (Pang et al. 2021).

For Gaussian noise of known standard deviation sigma, draw z ~ N(0, sigma^2) and train the network to map
``y + alpha * z`` to ``y - z / alpha``. The two recorrupted images have independent noise (their covariance
``sigma^2 - sigma^2 = 0``), so this is Noise2Noise from a single image and every pixel gives a gradient.
Poisson-Gaussian data is trained in the generalized-Anscombe domain, where its noise is close to unit-variance
Gaussian; the transform is part of the normalisation and travels with the model.

Reference: T. Pang, H. Zheng, Y. Quan, H. Ji, "Recorrupted-to-Recorrupted: Unsupervised Deep Learning for Image
Denoising", CVPR 2021.
"""
from __future__ import annotations

import numpy as np
import torch

from grainwright.trainer.schemes.base import Scheme, apply_model


class Recorrupted(Scheme):
    name = "recorrupted"
    layouts = ("noisy-only", "noisy-pairs", "noisy-stacks", "clean-noisy")
    needs_noise_level = True
    default_alpha = 0.3  # 0.1 dB better than 0.5 in `grainwright bench train` (docs/benchmarks.md)

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        noisy = patches["noisy"]
        alpha = self.alpha_for(self.config)
        z = rng.standard_normal(noisy.shape, dtype=np.float32) * self.sigma
        batch = {"noisy": noisy, "input": noisy + alpha * z, "target": noisy - z / alpha}
        level = self.noise_level(batch)
        if level is not None:
            batch["level"] = level * np.float32(np.sqrt(1.0 + alpha ** 2))  # the input is noisier than y
        return batch

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        return torch.mean((apply_model(model, batch["input"], batch.get("level")) - batch["target"]) ** 2)
