"""``sure``: training on noisy images alone by minimising Stein's unbiased risk estimate (Monte-Carlo SURE).

For ``y = x + n`` with Gaussian noise ``n ~ N(0, sigma^2 I)`` of known level and a weakly differentiable denoiser
``f``, Stein's lemma gives an estimate of the mean squared error that needs no clean image:

    SURE(f, y) = |y - f(y)|^2 / N - sigma^2 + 2 sigma^2 div f(y) / N

with ``N`` the number of pixels. Its expectation over the noise equals ``E |f(y) - x|^2 / N``, so every pixel of
every noisy patch gives a gradient. The divergence is the Monte-Carlo estimate of Ramani, Blu and Unser: for a
standard normal probe ``b``, ``div f(y) ~ b . (f(y + eps b) - f(y)) / eps``. Poisson-Gaussian data is trained in
the generalized-Anscombe domain and gamma speckle in the log domain, where the noise is close to Gaussian of a
known level; the transform is part of the normalisation and travels with the model.

The divergence is a finite difference of two forward passes, so both run in float32 even when the trainer chose
bfloat16 (its 8-bit mantissa would drown a difference of ``eps``-sized changes).

References: C. M. Stein, "Estimation of the mean of a multivariate normal distribution", Annals of Statistics
1981; S. Ramani, T. Blu, M. Unser, "Monte-Carlo SURE: a black-box optimization of regularization parameters for
general denoising algorithms", IEEE TIP 2008; S. Soltanayev, S. Y. Chun, "Training deep learning based
denoisers without ground truth data", NeurIPS 2018.
"""
from __future__ import annotations

import numpy as np
import torch

from grainwright.trainer.schemes.base import Scheme, apply_model

# Finite-difference step as a fraction of the noise level. Small enough for the first-order term to dominate,
# large enough against float32 rounding of outputs near 1 (common practice; no single published value).
EPSILON_PER_SIGMA = 0.01


def mc_sure(output: torch.Tensor, perturbed: torch.Tensor, noisy: torch.Tensor, probe: torch.Tensor,
            sigma: torch.Tensor, epsilon: torch.Tensor) -> torch.Tensor:
    """Monte-Carlo SURE per image, ``(N,)``: mean over pixels of the residual, noise and divergence terms.

    ``output = f(noisy)``, ``perturbed = f(noisy + epsilon * probe)``; ``sigma`` and ``epsilon`` broadcast to
    ``(N, C, 1, 1)`` (per channel, working units).
    """
    residual = (noisy - output) ** 2 - sigma ** 2
    divergence = probe * (perturbed - output) / epsilon
    return torch.mean(residual + 2 * sigma ** 2 * divergence, dim=(1, 2, 3))


class Sure(Scheme):
    name = "sure"
    layouts = ("noisy-only", "noisy-pairs", "noisy-stacks", "clean-noisy")
    needs_noise_level = True
    forward_passes_per_pixel = 6.0  # two forward passes, each with its backward pass

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        if self.sigma is None:
            raise ValueError("the sure scheme needs the noise level (a noise.toml, or a confident estimate)")
        noisy = patches["noisy"]
        batch = {"noisy": noisy, "probe": rng.standard_normal(noisy.shape, dtype=np.float32)}
        level = self.noise_level(batch)
        if level is not None:
            batch["level"] = level
        return batch

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        noisy, probe = batch["noisy"], batch["probe"]
        sigma = torch.as_tensor(self.sigma, dtype=noisy.dtype)
        epsilon = EPSILON_PER_SIGMA * sigma.clamp_min(1e-4)
        with torch.autocast("cpu", enabled=False):
            output = apply_model(model, noisy, batch.get("level"))
            perturbed = apply_model(model, noisy + epsilon * probe, batch.get("level"))
        return torch.mean(mc_sure(output, perturbed, noisy, probe, sigma, epsilon))
