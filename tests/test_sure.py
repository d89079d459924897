"""Monte-Carlo SURE against the truth on synthetic noise.

Open data: scikit-image's bundled sample images (camera, astronaut). Noise: Gaussian of known sigma, added here, so
the true PSNR of every denoiser's output is known. The denoisers are scikit-image and SciPy filters, called
directly so this test checks SURE alone.
"""
from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage import color, data, restoration, util

from grainwright.inference.evaluation.sure import (
    psnr_from_mse,
    sure_mse,
    sure_mse_poisson_gaussian,
    sure_mse_stabilized,
    unclipped_mask,
)

SIGMA = 20 / 255

# Each filter's output is a continuous function of its input, as SURE needs. Total-variation denoising runs to a
# tight tolerance: at scikit-image's default tolerance its stopping iteration jumps under the probe.
METHODS = {
    "gaussian-1px": lambda y: ndi.gaussian_filter(y, 1.0),
    "gaussian-2px": lambda y: ndi.gaussian_filter(y, 2.0),
    "median-3x3": lambda y: ndi.median_filter(y, 3),
    "tv": lambda y: restoration.denoise_tv_chambolle(y, weight=0.08, eps=1e-6, max_num_iter=200),
    "wavelet-bayes": lambda y: restoration.denoise_wavelet(y, method="BayesShrink", mode="soft", rescale_sigma=True),
}


def _true_psnr(clean, output):
    return psnr_from_mse(float(np.mean((np.asarray(output) - clean) ** 2)), 1.0)


@pytest.fixture(scope="module")
def scored():
    """(image, method) -> (true PSNR, SURE estimate) on two 512x512 sample images with Gaussian noise."""
    images = {
        "camera": util.img_as_float(data.camera()),
        "astronaut": color.rgb2gray(data.astronaut()),
    }
    results = {}
    for index, (name, clean) in enumerate(images.items()):
        noisy = clean + SIGMA * np.random.default_rng(index).standard_normal(clean.shape)
        for method, denoise in METHODS.items():
            output = denoise(noisy)
            estimate = sure_mse(denoise, noisy, SIGMA, output=output, seed=100 + index)
            results[name, method] = (_true_psnr(clean, output), estimate)
    return results


def test_sure_psnr_within_0_3_db_of_true_psnr(scored):
    # Requirement from the issue: within 0.3 dB for every method. The part SURE cannot know, the energy of this
    # noise draw, is about 0.1 dB (one standard error) at 512x512 and is reported with each estimate.
    for (image, method), (true_psnr, estimate) in scored.items():
        error = estimate.psnr - true_psnr
        assert abs(error) <= 0.3, f"{image}/{method}: SURE {estimate.psnr:.2f} dB, true {true_psnr:.2f} dB"
        assert abs(error) <= 3 * estimate.psnr_standard_error + 0.05, (image, method, error)


def test_sure_ranking_matches_true_ranking_when_psnrs_differ_by_1_db(scored):
    images = {image for image, _ in scored}
    compared = 0
    for image in images:
        for a, b in itertools.combinations(METHODS, 2):
            true_a, sure_a = scored[image, a]
            true_b, sure_b = scored[image, b]
            if abs(true_a - true_b) >= 1.0:
                compared += 1
                assert (true_a > true_b) == (sure_a.psnr > sure_b.psnr), (image, a, b)
    assert compared >= 6  # the set of methods spans several dB, so the check is not empty


def test_identity_and_constant_denoisers_by_hand():
    # Closed forms (Stein 1981): for f(y) = y the divergence is N, SURE = mean(n^2) - s^2 + 2 s^2 ~ s^2;
    # for f(y) = mean(y) (nearly constant) it is 1, SURE ~ mean((y - m)^2) - s^2. The Monte-Carlo divergence of
    # the identity is mean(b^2), within a few sqrt(2 / N) of 1.
    rng = np.random.default_rng(3)
    clean = util.img_as_float(data.camera())[:128, :128]
    noisy = clean + SIGMA * rng.standard_normal(clean.shape)
    identity = sure_mse(lambda y: y, noisy, SIGMA)
    assert identity.divergence == pytest.approx(1.0, abs=5 * np.sqrt(2 / noisy.size))
    assert identity.mse == pytest.approx(float(np.mean((noisy - clean) ** 2)), rel=0.05)
    flat = sure_mse(lambda y: np.full_like(y, y.mean()), noisy, SIGMA)
    assert abs(flat.divergence) < 1e-3
    assert flat.mse == pytest.approx(float(np.mean((clean.mean() - clean) ** 2)), rel=0.05)


def test_per_channel_sigma_on_colour_image():
    clean = util.img_as_float(data.astronaut())[:256, 128:384]
    sigmas = np.array([10, 20, 30]) / 255
    noisy = clean + sigmas * np.random.default_rng(5).standard_normal(clean.shape)

    def denoise(y):
        return ndi.gaussian_filter(y, (1.0, 1.0, 0))

    output = denoise(noisy)
    estimate = sure_mse(denoise, noisy, sigmas, output=output)
    assert abs(estimate.psnr - _true_psnr(clean, output)) <= 0.3


def _anscombe(y, gain, read):
    # Generalized Anscombe transform (Makitalo and Foi 2013, eq. 2), written out here as the outside reference.
    return 2.0 / gain * np.sqrt(np.maximum(gain * y + 3.0 / 8.0 * gain**2 + read**2, 0.0))


def _anscombe_algebraic_inverse(z, gain, read):
    return ((gain * z / 2.0) ** 2 - 3.0 / 8.0 * gain**2 - read**2) / gain


def test_poisson_gaussian_in_anscombe_domain():
    # Poisson-Gaussian with gain 1/200 of the range and read noise 1% of range: 200 counts at full scale.
    gain, read = 1 / 200, 0.01
    clean = 0.1 + 0.8 * util.img_as_float(data.camera())
    rng = np.random.default_rng(7)
    noisy = gain * rng.poisson(clean / gain) + read * rng.standard_normal(clean.shape)

    def forward(y):
        return _anscombe(y, gain, read)

    def inverse(z):
        return _anscombe_algebraic_inverse(z, gain, read)

    peak = float(forward(1.0) - forward(0.0))
    for sigma_px in (1.0, 2.0):

        def denoise(y, s=sigma_px):
            return ndi.gaussian_filter(y, s)

        output = denoise(noisy)
        estimate = sure_mse_stabilized(denoise, noisy, forward, inverse, peak=peak, output=output)
        # At 18 counts and more the stabilised noisy image is unbiased for forward(clean) to well under the
        # noise (Makitalo and Foi 2013), so forward(clean) stands for the stabilised truth.
        true = psnr_from_mse(float(np.mean((forward(output) - forward(clean)) ** 2)), peak)
        assert abs(estimate.psnr - true) <= 0.3, (sigma_px, estimate.psnr, true)


@pytest.mark.parametrize("gain, read", [(1 / 200, 0.01), (0.01, 0.02)])
def test_poisson_gaussian_before_the_transform_matches_the_true_error(gain, read):
    # Luisier, Blu and Unser (IEEE TIP 2011): the unbiased risk estimate for mixed Poisson-Gaussian noise; to first
    # order in the gain, SURE with the variance gain * y + read^2 at each noisy value. Checked against the true mean
    # squared error on the untransformed values, for smoothing filters of several strengths, and against the
    # ordering of the true errors; 200 and 100 counts at full scale.
    clean = 0.1 + 0.8 * util.img_as_float(data.camera())
    rng = np.random.default_rng(11)
    noisy = gain * rng.poisson(clean / gain) + read * rng.standard_normal(clean.shape)
    estimates, truths = [], []
    for sigma_px in (0.7, 1.0, 2.0):
        def denoise(y, s=sigma_px):
            return ndi.gaussian_filter(y, s)

        estimate = sure_mse_poisson_gaussian(denoise, noisy, gain, read, seed=3)
        true = float(np.mean((denoise(noisy) - clean) ** 2))
        assert abs(estimate.mse - true) <= 0.03 * true, (sigma_px, estimate.mse, true)
        estimates.append(estimate.mse)
        truths.append(true)
    assert np.argsort(estimates).tolist() == np.argsort(truths).tolist()
    # The untransformed noisy image itself: its error is the mean noise variance, and the estimate is then the mean
    # of gain * y + read^2 (the identity's divergence is one everywhere), unbiased for it.
    identity = sure_mse_poisson_gaussian(lambda y: y, noisy, gain, read)
    assert identity.mse == pytest.approx(float(np.mean((noisy - clean) ** 2)), rel=0.02)


def test_clipped_pixels_are_left_out():
    # Sensor data is clipped at its range; there the noise is not Gaussian and SURE's identity fails. Scoring
    # only pixels clear of the clipping levels restores the estimate over those pixels. Camera has large
    # near-black and near-white areas.
    clean = util.img_as_float(data.camera())
    noisy = np.clip(clean + SIGMA * np.random.default_rng(11).standard_normal(clean.shape), 0.0, 1.0)
    mask = unclipped_mask(noisy, SIGMA)
    assert 0.3 < mask.mean() < 0.98  # about 46% here
    for denoise in (METHODS["gaussian-1px"], METHODS["wavelet-bayes"]):
        output = denoise(noisy)
        true = psnr_from_mse(float(np.mean(((output - clean) ** 2)[mask])), 1.0)
        masked = sure_mse(denoise, noisy, SIGMA, output=output, mask=mask)
        assert abs(masked.psnr - true) <= 0.3
        unmasked = sure_mse(denoise, noisy, SIGMA, output=output)
        assert abs(unmasked.psnr - _true_psnr(clean, output)) > abs(masked.psnr - true)
