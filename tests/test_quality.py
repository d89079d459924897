"""MS-SSIM against an independent implementation, and the no-reference figures on known cases.

Outside references: the ``sewar`` package (a general-purpose image-quality library on PyPI, numpy/SciPy based;
test-only dependency) for MS-SSIM; scikit-image's bundled sample images (camera, astronaut) as open data.

Settings compared, the same on both sides (Wang, Simoncelli and Bovik 2003): 11x11 Gaussian window with standard
deviation 1.5, K1 = 0.01, K2 = 0.03, SSIM averaged over the positions where the window fits ('valid'), five
scales with weights (0.0448, 0.2856, 0.3001, 0.2363, 0.1333), contrast-structure at scales 1-4 times SSIM at
scale 5, and between scales a 2x2 average keeping every other pixel. One difference in sewar 0.4.10 as shipped:
its 2x2 average (``uniform_filter(im, 2)``) is centred one pixel earlier than the block average of the paper's
reference code, so the exact check below aligns it with ``origin=-1`` and a second check bounds the difference
the shift makes.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from skimage import color, data, util

from grainwright.inference.evaluation.quality import (
    ms_ssim,
    ms_ssim_scales,
    no_reference_figures,
    residual_autocorrelation,
)

sewar_full_ref = pytest.importorskip(
    "sewar.full_ref", reason="MS-SSIM reference: install the test extra (sewar)"
)


def _pairs():
    """(reference, distorted) pairs at least 256x256, in [0, 1], one with odd sides."""
    rng = np.random.default_rng(0)
    camera = util.img_as_float(data.camera())
    astronaut = color.rgb2gray(data.astronaut())
    return {
        "camera-noise": (camera, np.clip(camera + 0.08 * rng.standard_normal(camera.shape), 0, 1)),
        "camera-blur": (camera, ndimage.gaussian_filter(camera, 2.0)),
        "astronaut-odd-crop-noise+blur": (
            astronaut[:301, :277],
            ndimage.gaussian_filter(astronaut[:301, :277], 1.0) + 0.03 * rng.standard_normal((301, 277)),
        ),
    }


def _block_average(image, size):
    # The paper's reference code's 2x2 block average (imfilter with ones(2)/4, 'symmetric'), first pixel first.
    return ndimage.uniform_filter(image, size=(2, 2, 1), origin=(-1, -1, 0))


@pytest.mark.parametrize("name", list(_pairs()))
def test_ms_ssim_matches_sewar_with_aligned_downsampling(name, monkeypatch):
    reference, test = _pairs()[name]
    monkeypatch.setattr(sewar_full_ref, "uniform_filter", _block_average)
    expected = sewar_full_ref.msssim(reference, test, MAX=1.0)
    assert ms_ssim(reference, test, data_range=1.0) == pytest.approx(expected, abs=1e-6)


@pytest.mark.parametrize("name", list(_pairs()))
def test_ms_ssim_close_to_sewar_as_shipped(name):
    reference, test = _pairs()[name]
    expected = sewar_full_ref.msssim(reference, test, MAX=1.0)
    # Only the one-pixel phase of the downsampling differs (module docstring).
    assert ms_ssim(reference, test, data_range=1.0) == pytest.approx(expected, abs=5e-3)


def test_ms_ssim_identity_ordering_and_scales():
    camera = util.img_as_float(data.camera())[:256, :256]
    assert ms_ssim(camera, camera, 1.0) == pytest.approx(1.0)
    rng = np.random.default_rng(1)
    noise = rng.standard_normal(camera.shape)
    scores = [ms_ssim(camera, camera + s * noise, 1.0) for s in (0.02, 0.05, 0.1)]
    assert scores[0] > scores[1] > scores[2]
    # Halving rounds up (an odd edge repeats its last row): 161 -> 81 -> 41 -> 21 -> 11, five scales.
    assert ms_ssim_scales(161, 400) == 5
    assert ms_ssim_scales(160, 400) == 4
    assert ms_ssim_scales(64, 64) == 3
    assert 0 < ms_ssim(camera[:64, :64], camera[:64, :64] + 0.05 * noise[:64, :64], 1.0) < 1


def test_ms_ssim_colour_and_units():
    astronaut = util.img_as_float(data.astronaut())[:256, :256]
    blurred = ndimage.gaussian_filter(astronaut, (1.5, 1.5, 0))
    in_unit_range = ms_ssim(astronaut, blurred, 1.0)
    in_8_bit_units = ms_ssim(astronaut * 255, blurred * 255, 255.0)
    assert in_unit_range == pytest.approx(in_8_bit_units, abs=1e-9)


def test_residual_autocorrelation_white_versus_smooth():
    rng = np.random.default_rng(2)
    white = rng.standard_normal((128, 128))
    # White noise: every lag within a few 1/sqrt(N) of zero.
    assert residual_autocorrelation(white)["max_abs"] < 5 / 128
    # Gaussian-smoothed noise of width 1 px: lag-1 correlation exp(-1/4) ~ 0.78 (Gaussian autocorrelation of
    # width sqrt(2) px).
    smooth = ndimage.gaussian_filter(white, 1.0)
    assert residual_autocorrelation(smooth)["lags"]["0,1"] == pytest.approx(np.exp(-0.25), abs=0.05)


def test_no_reference_figures_tell_identity_blur_and_oracle_apart():
    clean = util.img_as_float(data.camera())[128:256, 128:256]
    sigma = 20 / 255
    noisy = clean + sigma * np.random.default_rng(3).standard_normal(clean.shape)
    identity = no_reference_figures(noisy, noisy)
    oracle = no_reference_figures(noisy, clean)  # removes exactly the noise
    blur = no_reference_figures(noisy, ndimage.gaussian_filter(noisy, 3.0))
    assert identity["noise_left"] == pytest.approx(1.0)
    assert oracle["noise_left"] < 0.3 and blur["noise_left"] < 0.3
    # What the oracle removed is white and unrelated to its output; what the blur removed carries edges.
    assert oracle["residual_autocorrelation"] < 0.05
    assert blur["residual_autocorrelation"] > 3 * oracle["residual_autocorrelation"]
    assert abs(oracle["residual_output_correlation"]) < 0.05
