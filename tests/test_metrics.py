"""PSNR and SSIM against scikit-image's reference implementations (skimage.metrics)."""
from __future__ import annotations

import math

import numpy as np
import pytest
from skimage import data
from skimage import metrics as skmetrics

from grainwright.inference.evaluation.metrics import psnr, ssim

RNG = np.random.default_rng(11)


def _noisy(image: np.ndarray, sigma: float, peak: float) -> np.ndarray:
    return np.clip(image + RNG.normal(0, sigma, image.shape), 0, peak)


@pytest.mark.parametrize("crop", [data.camera()[100:228, 200:328], data.astronaut()[:96, 100:228]])
def test_psnr_matches_skimage(crop):
    reference = crop.astype(np.float64)
    test = _noisy(reference, 12, 255)
    # Reference implementation: skimage.metrics.peak_signal_noise_ratio with the same explicit peak.
    assert psnr(reference, test, 255) == pytest.approx(
        skmetrics.peak_signal_noise_ratio(reference, test, data_range=255), abs=1e-9
    )


def test_psnr_peak_is_the_effective_bit_depth_maximum():
    reference = (data.moon()[:64, :64].astype(np.float64) * 16)  # 8-bit sample scaled to 12 bits
    test = _noisy(reference, 40, 4095)
    expected = 10 * math.log10(4095**2 / np.mean((reference - test) ** 2))
    assert psnr(reference, test, 4095) == pytest.approx(expected)
    assert psnr(reference, reference, 4095) == math.inf


@pytest.mark.parametrize(
    "reference,peak",
    [
        (data.camera()[:128, :128].astype(np.float64), 255.0),
        (data.astronaut()[200:300, 200:328].astype(np.float64), 255.0),
        (data.coins()[:100, :120].astype(np.float64) / 255.0, 1.0),
    ],
)
def test_ssim_matches_skimage_with_wang_2004_settings(reference, peak):
    test = _noisy(reference, 0.08 * peak, peak)
    # Wang et al. 2004 settings in skimage: Gaussian weights, sigma 1.5 (11x11 window), K1 0.01, K2 0.03,
    # population covariance, explicit data range.
    expected = skmetrics.structural_similarity(
        reference,
        test,
        data_range=peak,
        channel_axis=-1 if reference.ndim == 3 else None,
        gaussian_weights=True,
        sigma=1.5,
        use_sample_covariance=False,
        K1=0.01,
        K2=0.03,
    )
    assert ssim(reference, test, data_range=peak) == pytest.approx(expected, abs=1e-7)


def test_ssim_of_identical_images_is_one_and_small_images_are_refused():
    image = data.camera()[:32, :32].astype(np.float64)
    assert ssim(image, image, 255) == pytest.approx(1.0)
    with pytest.raises(ValueError, match="at least 11"):
        ssim(image[:8], image[:8], 255)
