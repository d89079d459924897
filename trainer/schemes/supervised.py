"""``supervised``: learn the clean image from a noisy one.

With clean images only, every step draws fresh synthetic noise from the noise model, so the network never sees
the same noise twice; with clean/noisy pairs it learns from the real noisy shots. Loss: mean squared error to the
clean patch (the setting of Zhang et al. 2017, "Beyond a Gaussian Denoiser").
"""
from __future__ import annotations

import numpy as np
import torch

from grainwright.trainer.schemes.base import Scheme, apply_model


class Supervised(Scheme):
    name = "supervised"
    layouts = ("clean-only", "clean-noisy")
    clean_targets = True

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        clean = patches["clean"]
        if "noisy" in patches:
            noisy = patches["noisy"]
        else:
            # Noise models work on (N, H, W, C) stacks.
            noisy = self.noise.sample(clean.transpose(0, 2, 3, 1), rng).transpose(0, 3, 1, 2)
        batch = {"clean": clean, "noisy": np.ascontiguousarray(noisy, dtype=np.float32)}
        level = self.noise_level(batch)
        if level is not None:
            batch["level"] = level
        return batch

    def noise_level(self, batch: dict[str, np.ndarray]) -> np.ndarray | None:
        """The noise model's per-pixel level at the noisy input clipped to the range, as the runtime computes it
        (``OnnxDenoiser(noise_sigma="model")``, which it picks for supervised models of signal-dependent noise);
        a transformed working range (set explicitly) or no noise model: the base class's one level.

        Never the level at the clean patch: for signal-dependent noise that map is a function of the clean image
        and hands the network its target (a Poisson-Gaussian model trained so scored 47.6 dB on one of its
        training frames given that map, and 32.5 dB given the map of its noisy input, which is all the runtime
        has)."""
        if not self.level_maps:
            return None
        if self.noise is not None and self.config["data"]["transform"] not in ("anscombe", "log"):
            noisy = np.clip(batch["noisy"], 0.0, 1.0).transpose(0, 2, 3, 1)
            sigma = self.noise.sigma_map(noisy)
            if sigma is not None:
                sigma = np.broadcast_to(sigma, noisy.shape)
                return np.ascontiguousarray(sigma.mean(axis=3, keepdims=True).transpose(0, 3, 1, 2), np.float32)
        return super().noise_level(batch)

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        return torch.mean((apply_model(model, batch["noisy"], batch.get("level")) - batch["clean"]) ** 2)
