"""Choosing baseline parameters: ground-truth grid search and J-invariant calibration (Batson and Royer 2019).

Outside references: scikit-image's ``calibrate_denoiser`` (an implementation of the same paper) and
``skimage.metrics.peak_signal_noise_ratio``; open data: crops of scikit-image's sample images.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from skimage import data
from skimage.metrics import peak_signal_noise_ratio
from skimage.restoration import calibrate_denoiser, denoise_tv_chambolle

from grainwright.inference.baselines.registry import denoise, resolve_params
from grainwright.inference.evaluation.calibration import (
    CALIBRATED_LABEL,
    GROUND_TRUTH_LABEL,
    calibrate,
    grid_offsets,
    j_invariant_loss,
    j_invariant_output,
    tune_on_ground_truth,
)
from grainwright.inference.noise.models import PoissonGaussianNoise

SIGMA = 25 / 255


def _pair(size: int = 96, seed: int = 0, image=data.camera, top: int = 100, left: int = 200):
    clean = (image()[top : top + size, left : left + size] / 255.0).astype(np.float32)
    noisy = (clean + np.random.default_rng(seed).normal(0.0, SIGMA, clean.shape)).astype(np.float32)
    return clean[:, :, None], noisy[:, :, None]


def test_same_best_gaussian_width_as_scikit_image():
    # Reference: skimage.restoration.calibrate_denoiser with the exact (all-masks) loss.
    _, noisy = _pair()
    widths = [0.5, 0.75, 1.0, 1.5, 2.0, 3.0]
    _, (tested, losses) = calibrate_denoiser(
        noisy[:, :, 0],
        lambda image, width: ndimage.gaussian_filter(image, width, mode="reflect"),
        {"width": widths},
        approximate_loss=False,
        extra_output=True,
    )
    ours = calibrate("gaussian", noisy, SIGMA, grid=[{"width": w} for w in widths], include_defaults=False)
    assert ours.params["width"] == tested[int(np.argmin(losses))]["width"]
    assert ours.label == CALIBRATED_LABEL
    # Same construction, so the losses agree too.
    np.testing.assert_allclose([score for _, score in ours.trials], losses, rtol=1e-4)


def test_same_best_tv_weight_as_scikit_image():
    # Reference: skimage.restoration.calibrate_denoiser on scikit-image's own TV denoiser, weight = strength * sigma.
    _, noisy = _pair(seed=1, image=data.coins, top=50, left=50)
    strengths = [0.25, 0.5, 0.75, 1.0, 1.5, 2.0]
    _, (tested, losses) = calibrate_denoiser(
        noisy[:, :, 0],
        lambda image, weight: denoise_tv_chambolle(image, weight=weight),
        {"weight": [s * SIGMA for s in strengths]},
        approximate_loss=False,
        extra_output=True,
    )
    ours = calibrate("tv", noisy, SIGMA, grid=[{"strength": s} for s in strengths], include_defaults=False)
    assert ours.params["strength"] * SIGMA == pytest.approx(tested[int(np.argmin(losses))]["weight"])


def test_output_is_j_invariant():
    # Batson and Royer's definition: an output pixel must not depend on its own noisy input value.
    _, noisy = _pair(32)
    changed = noisy.copy()
    changed[13, 17, 0] += 5.0
    smooth = lambda image: ndimage.gaussian_filter(image, (1.5, 1.5, 0))  # noqa: E731
    before, _ = j_invariant_output(smooth, noisy)
    after, _ = j_invariant_output(smooth, changed)
    assert after[13, 17, 0] == pytest.approx(before[13, 17, 0], abs=1e-6)
    assert not np.allclose(after, before)  # neighbours do see it


def test_loss_is_true_error_plus_noise_variance():
    # Batson and Royer 2019: E|g(y) - y|^2 = E|g(y) - x|^2 + sigma^2 for J-invariant g and independent noise.
    clean, noisy = _pair(128, seed=2)
    smooth = lambda image: ndimage.gaussian_filter(image, (1.0, 1.0, 0))  # noqa: E731
    output, _ = j_invariant_output(smooth, noisy)
    true_error = float(np.mean((output - clean) ** 2))
    assert j_invariant_loss(smooth, noisy) == pytest.approx(true_error + SIGMA**2, rel=0.05)


def test_fewer_passes_score_a_spread_subset():
    offsets = grid_offsets(4, 4)
    assert len(offsets) == 4
    assert {row for row, _ in offsets} == {0, 1, 2, 3} and {col for _, col in offsets} == {0, 1, 2, 3}
    assert len(set(grid_offsets(4))) == 16
    _, noisy = _pair(48)
    _, scored = j_invariant_output(lambda image: image, noisy, passes=4)
    assert scored.mean() == pytest.approx(4 / 16)


def test_ground_truth_search_finds_the_psnr_maximum():
    # Reference: skimage.metrics.peak_signal_noise_ratio over the same grid, evaluated here directly.
    clean, noisy = _pair(64, seed=3)
    tuning = tune_on_ground_truth("tv", noisy, clean, SIGMA)
    assert tuning.label == GROUND_TRUTH_LABEL == "tuned on ground truth"
    direct = {
        point["strength"]: peak_signal_noise_ratio(clean, denoise("tv", noisy, SIGMA, **point), data_range=1.0)
        for point, _ in tuning.trials
    }
    assert tuning.params["strength"] == max(direct, key=direct.get)
    assert tuning.score == pytest.approx(max(direct.values()), abs=1e-3)
    # The defaults are among the points tried, so tuning never reports less than the defaults give.
    assert {"strength": resolve_params("tv", SIGMA)["strength"]} in [point for point, _ in tuning.trials]
    assert tuning.to_dict()["label"] == GROUND_TRUTH_LABEL


def test_calibration_without_ground_truth_lands_near_the_tuned_choice():
    # The J-invariant choice should cost little PSNR against the ground-truth choice (Batson and Royer report
    # near-oracle parameters for classical denoisers); checked on NLM's filter strength.
    clean, noisy = _pair(96, seed=4, image=data.coins, top=60, left=60)
    calibrated = calibrate("nlm", noisy, SIGMA)
    tuned = tune_on_ground_truth("nlm", noisy, clean, SIGMA, grid=[point for point, _ in calibrated.trials])
    chosen = peak_signal_noise_ratio(clean, denoise("nlm", noisy, SIGMA, **calibrated.params), data_range=1.0)
    assert chosen > tuned.score - 0.5


def test_calibration_runs_through_the_anscombe_domain():
    clean = (data.camera()[100:164, 200:264] / 255.0).astype(np.float32)[:, :, None]
    noise = PoissonGaussianNoise(gain=0.02, read=0.01)
    noisy = noise.sample(clean, np.random.default_rng(5))
    tuning = calibrate("gaussian", noisy, noise, passes=4)
    assert tuning.params["width"] in (0.5, 1.0, 1.5, 2.0)
    assert all(np.isfinite(score) for _, score in tuning.trials)


def test_bm3d_calibrates_on_a_small_crop():
    # The costliest baseline through the whole J-invariant path: grid of thresholds plus the defaults.
    _, noisy = _pair(40, seed=6)
    tuning = calibrate("bm3d", noisy, SIGMA, passes=2)
    assert tuning.params["threshold"] in (2.2, 2.7, 3.2)
    assert len(tuning.trials) == 3  # the default, 2.7, is already in the grid
    assert tuning.score == min(score for _, score in tuning.trials)
