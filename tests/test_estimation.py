"""Noise estimation checked on scikit-image sample images with known noise added."""
from __future__ import annotations

import numpy as np
import pytest
from skimage import color, data, restoration

from grainwright.inference.estimation import estimate_sigma

RNG = np.random.default_rng(2024)


def _gray_astronaut() -> np.ndarray:
    return np.round(color.rgb2gray(data.astronaut()) * 255)


SAMPLES = {
    "astronaut": _gray_astronaut,
    "camera": lambda: data.camera().astype(np.float64),
    "moon": lambda: data.moon().astype(np.float64),
    "brick": lambda: data.brick().astype(np.float64),
    "coins": lambda: data.coins().astype(np.float64),
}


@pytest.mark.parametrize("name", sorted(SAMPLES))
@pytest.mark.parametrize("sigma", [5.0, 10.0, 25.0])
def test_mad_sigma_within_ten_percent_on_sample_images(name, sigma):
    # Open data: scikit-image sample images; method: Donoho and Johnstone 1994 wavelet MAD.
    clean = SAMPLES[name]()[:256, :256]
    noisy = np.clip(np.round(clean + RNG.normal(0, sigma, clean.shape)), 0, 255)
    estimate = estimate_sigma(noisy)
    assert estimate.shape == (1,)
    assert estimate[0] == pytest.approx(sigma, rel=0.10)


def test_agrees_with_skimage_estimate_sigma_where_that_is_unbiased():
    # Implementation cross-check: skimage.restoration.estimate_sigma is the plain MAD estimator (db2 HH).
    # On a smooth unclipped image both must agree closely.
    clean = data.moon()[:256, :256].astype(np.float64)
    noisy = clean + RNG.normal(0, 8.0, clean.shape)
    ours = estimate_sigma(noisy, flat_only=False, exclude_extremes=False)[0]
    assert ours == pytest.approx(restoration.estimate_sigma(noisy), rel=1e-9)
    assert estimate_sigma(noisy)[0] == pytest.approx(restoration.estimate_sigma(noisy), rel=0.05)


def test_per_channel_and_units_follow_the_input():
    clean = data.astronaut()[:192, :192].astype(np.float64)
    sigmas = np.array([4.0, 8.0, 16.0])
    noisy = clean + RNG.normal(0, 1, clean.shape) * sigmas
    np.testing.assert_allclose(estimate_sigma(noisy), sigmas, rtol=0.10)
    np.testing.assert_allclose(estimate_sigma(noisy / 255.0), sigmas / 255.0, rtol=0.10)
