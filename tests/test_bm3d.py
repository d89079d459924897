"""BM3D, written here from Dabov, Foi, Katkovnik and Egiazarian, IEEE Trans. Image Processing 2007.

Open data: crops of scikit-image's bundled sample images. References: SciPy's DCT, PyWavelets' Haar transform,
scikit-image's non-local means, and the published comparisons of BM3D with NLM.
"""
from __future__ import annotations

import numpy as np
import pytest
import pywt
from scipy.fft import dct
from skimage import color, data

from grainwright.inference.baselines.bm3d import _match, dct_matrix, haar_matrix
from grainwright.inference.baselines.registry import denoise
from grainwright.inference.evaluation.calibration import tune_on_ground_truth
from grainwright.inference.evaluation.metrics import psnr

SIGMA = 25 / 255


def _crops(size: int = 96) -> dict[str, np.ndarray]:
    """Grayscale crops with structure (edges, texture, smooth shading) from scikit-image's sample images."""
    return {
        "camera": data.camera()[100 : 100 + size, 200 : 200 + size] / 255.0,
        "astronaut": color.rgb2gray(data.astronaut())[60 : 60 + size, 160 : 160 + size],
        "coins": data.coins()[60 : 60 + size, 60 : 60 + size] / 255.0,
        "moon": data.moon()[200 : 200 + size, 200 : 200 + size] / 255.0,
    }


def _noisy(clean: np.ndarray, sigma: float, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return (clean + rng.normal(0.0, sigma, clean.shape)).astype(np.float32)


def test_dct_matrix_matches_scipy():
    # Reference: scipy.fft.dct, orthonormal DCT-II.
    x = np.random.default_rng(0).random((8, 5))
    np.testing.assert_allclose(dct_matrix(8) @ x, dct(x, norm="ortho", axis=0), atol=1e-6)


@pytest.mark.parametrize("size", [2, 4, 8, 16, 32])
def test_haar_matrix_matches_pywavelets(size):
    # Reference: PyWavelets' full Haar decomposition, coefficients ordered coarse to fine.
    x = np.random.default_rng(size).random(size)
    expected = np.concatenate(pywt.wavedec(x, "haar", level=int(np.log2(size))))
    np.testing.assert_allclose(haar_matrix(size) @ x, expected, atol=1e-6)
    np.testing.assert_allclose(haar_matrix(size) @ haar_matrix(size).T, np.eye(size), atol=1e-6)


def test_block_matching_distances_match_brute_force():
    # The paper's distance: squared Euclidean distance between blocks over the block area (lambda_2D = 0).
    rng = np.random.default_rng(2)
    image = rng.random((23, 19)).astype(np.float32) - 0.5
    block, radius = 4, 3
    ref_y, ref_x = np.array([0, 5, 19]), np.array([0, 7, 15])
    distances = _match(image, ref_y, ref_x, block, radius).reshape(3, 3, 2 * radius + 1, 2 * radius + 1)
    for i, y in enumerate(ref_y):
        for j, x in enumerate(ref_x):
            reference = image[y : y + block, x : x + block]
            for dy in range(-radius, radius + 1):
                for dx in range(-radius, radius + 1):
                    got = distances[i, j, dy + radius, dx + radius]
                    inside = 0 <= y + dy <= 23 - block and 0 <= x + dx <= 19 - block
                    if (dy, dx) == (0, 0):
                        assert got < 0  # the reference is forced to lead its own group
                    elif not inside:
                        assert got == np.inf
                    else:
                        candidate = image[y + dy : y + dy + block, x + dx : x + dx + block]
                        assert got == pytest.approx(np.mean((reference - candidate) ** 2), rel=1e-4, abs=1e-6)


def test_wiener_stage_beats_hard_stage_and_bm3d_beats_nlm():
    """Gaussian sigma 25/255 on four sample crops.

    The paper's second (Wiener) stage improves on its first (hard-threshold) stage. Against non-local means
    the literature puts BM3D about 0.5-1 dB higher in PSNR at this noise level (Dabov et al. 2007's tables
    and later benchmarks; figures from memory); we ask for at least 0.3 dB on average against scikit-image's
    NLM tuned per image on ground truth over a small grid of filter strengths and patch sizes.
    """
    results = {"bm3d": [], "hard": [], "nlm": []}
    nlm_grid = [{"strength": s, "patch_radius": p} for s in (0.4, 0.6, 0.8, 1.0) for p in (2, 3)]
    for seed, (name, clean) in enumerate(_crops().items()):
        clean = clean.astype(np.float32)[:, :, None]
        noisy = _noisy(clean, SIGMA, seed)
        full = psnr(clean, denoise("bm3d", noisy, SIGMA), 1.0)
        hard = psnr(clean, denoise("bm3d", noisy, SIGMA, wiener=False), 1.0)
        nlm = tune_on_ground_truth("nlm", noisy, clean, SIGMA, grid=nlm_grid).score
        assert full > hard, f"{name}: Wiener stage {full:.2f} dB not above hard-threshold stage {hard:.2f} dB"
        results["bm3d"].append(full)
        results["hard"].append(hard)
        results["nlm"].append(nlm)
    gain = np.mean(results["bm3d"]) - np.mean(results["nlm"])
    assert gain >= 0.3, f"BM3D only {gain:.2f} dB above tuned NLM: {results}"


def test_colour_opponent_space_beats_per_channel():
    # Dabov et al.'s colour extension (grouping on luminance, filtering in an opponent space) should not lose
    # to filtering each RGB channel on its own, whose groups are matched on noisier data.
    clean = data.astronaut()[100:164, 180:244].astype(np.float32) / 255.0
    noisy = _noisy(clean, SIGMA, 7)
    opponent = psnr(clean, denoise("bm3d", noisy, SIGMA), 1.0)
    separate = psnr(clean, denoise("bm3d", noisy, SIGMA, colour="per-channel"), 1.0)
    assert opponent > separate > psnr(clean, noisy, 1.0) + 5.0


def test_bm3d_commutes_with_affine_rescaling():
    # Thresholds are multiples of sigma, so BM3D(a x + b, a sigma) = a BM3D(x, sigma) + b: it works in any units.
    clean = (data.camera()[200:240, 200:240] / 255.0).astype(np.float32)[:, :, None]
    noisy = _noisy(clean, SIGMA, 3)
    base = denoise("bm3d", noisy, SIGMA)
    scaled = denoise("bm3d", 40.0 * noisy + 3.0, 40.0 * SIGMA, data_range=40.0)
    # float32 rounding may flip a coefficient (or a block match) lying right at a threshold; such flips move a
    # few pixels by a fraction of an 8-bit level.
    error = np.abs((scaled - 3.0) / 40.0 - base)
    assert np.mean(error < 1e-3) > 0.99 and error.max() < 1e-2


@pytest.mark.parametrize("shape", [(1, 1, 1), (5, 7, 1), (9, 30, 3), (8, 8, 2)])
def test_small_and_odd_shapes(shape):
    image = np.random.default_rng(4).random(shape).astype(np.float32)
    out = denoise("bm3d", image, 0.1)
    assert out.shape == shape and out.dtype == np.float32 and np.all(np.isfinite(out))
