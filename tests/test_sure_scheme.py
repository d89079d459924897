"""The ``sure`` training scheme: Monte-Carlo SURE against the true mean squared error.

Outside references: Stein 1981 (SURE is an unbiased estimate of the MSE for Gaussian noise of known level);
Ramani, Blu and Unser, IEEE TIP 2008 (the Monte-Carlo divergence b . (f(y + eps b) - f(y)) / eps); open data:
scikit-image's bundled ``camera`` image.
"""
from __future__ import annotations

import numpy as np
import pytest
import torch
from skimage import data

from grainwright.trainer.config import defaults
from grainwright.trainer.schemes.registry import SCHEMES
from grainwright.trainer.schemes.sure import Sure, mc_sure

torch.set_num_threads(1)
SIGMA = 0.1


class Smoother(torch.nn.Module):
    """A fixed denoiser: 3x3 box blur followed by a soft non-linearity (weakly differentiable, as Stein needs)."""

    takes_noise_map = False

    def forward(self, image):
        kernel = torch.full((1, 1, 3, 3), 1 / 9)
        blurred = torch.nn.functional.conv2d(image, kernel, padding=1)
        return blurred + 0.05 * torch.tanh(4 * (image - blurred))


def _draws(count: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    clean = (data.camera()[200:264, 200:264] / 255.0).astype(np.float32)[None, None]
    clean = np.repeat(clean, count, axis=0)
    noisy = clean + SIGMA * np.random.default_rng(seed).standard_normal(clean.shape).astype(np.float32)
    return clean, noisy


def test_sure_is_registered_and_needs_the_noise_level():
    assert SCHEMES["sure"] is Sure and Sure.needs_noise_level
    with pytest.raises(ValueError, match="noise level"):
        Sure(defaults()).prepare({"noisy": np.zeros((1, 1, 8, 8), np.float32)}, np.random.default_rng(0))


def test_mc_sure_matches_the_true_mse_in_expectation():
    # Stein 1981: E[SURE] = E|f(y) - x|^2 / N. Per-image SURE minus per-image true MSE has mean zero; accept the
    # sample mean within four standard errors (Monte-Carlo error of the noise and the divergence probe).
    clean, noisy = _draws(400, seed=1)
    scheme = Sure(defaults(), sigma=np.array([SIGMA]))
    batch = {k: torch.from_numpy(v) for k, v in scheme.prepare({"noisy": noisy}, np.random.default_rng(2)).items()}
    model = Smoother()
    sigma = torch.tensor(SIGMA).reshape(1, 1, 1, 1)
    epsilon = 0.01 * sigma
    with torch.no_grad():
        output = model(batch["noisy"])
        perturbed = model(batch["noisy"] + epsilon * batch["probe"])
        estimate = mc_sure(output, perturbed, batch["noisy"], batch["probe"], sigma, epsilon).numpy()
        true_mse = torch.mean((output - torch.from_numpy(clean)) ** 2, dim=(1, 2, 3)).numpy()
    difference = estimate - true_mse
    standard_error = difference.std(ddof=1) / np.sqrt(difference.size)
    assert abs(difference.mean()) < 4 * standard_error
    assert abs(difference.mean()) < 0.02 * true_mse.mean()  # and the agreement is tight in absolute terms
    # the scheme's loss is the batch mean of the same estimate
    with torch.no_grad():
        assert float(scheme.loss(model, batch, 1.0)) == pytest.approx(float(estimate.mean()), rel=1e-5)


def test_mc_divergence_of_a_linear_filter_is_its_trace():
    # For f(y) = H y the divergence is trace(H): for a zero-padded 3x3 box blur, N / 9 (Ramani et al. 2008).
    model = torch.nn.Conv2d(1, 1, 3, padding=1, bias=False)
    torch.nn.init.constant_(model.weight, 1 / 9)
    model.takes_noise_map = False
    _, noisy = _draws(64, seed=3)
    probe = torch.from_numpy(np.random.default_rng(4).standard_normal(noisy.shape).astype(np.float32))
    y = torch.from_numpy(noisy)
    with torch.no_grad():
        divergence = (probe * (model(y + 1e-3 * probe) - model(y)) / 1e-3).sum(dim=(1, 2, 3))
    pixels = noisy.shape[-1] * noisy.shape[-2]
    assert divergence.mean().item() == pytest.approx(pixels / 9, rel=0.03)


def test_sure_ranks_a_denoiser_above_the_identity():
    # The identity's SURE is sigma^2 (its true MSE); the smoother's is far lower on a natural image.
    _, noisy = _draws(16, seed=5)
    scheme = Sure(defaults(), sigma=np.array([SIGMA]))
    batch = {k: torch.from_numpy(v) for k, v in scheme.prepare({"noisy": noisy}, np.random.default_rng(6)).items()}

    class Identity(torch.nn.Module):
        takes_noise_map = False

        def forward(self, image):
            return image

    with torch.no_grad():
        identity = float(scheme.validation_loss(Identity(), batch))
        smoother = float(scheme.validation_loss(Smoother(), batch))
    assert identity == pytest.approx(SIGMA ** 2, rel=0.02)
    assert smoother < 0.5 * identity
