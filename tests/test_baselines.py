"""The classical baselines registry, its uniform call, and the noise domains.

Open data: crops of scikit-image's bundled sample images. References are named beside each check.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage, stats
from skimage import data

from grainwright.inference.baselines.base import Baseline
from grainwright.inference.baselines.domains import denoise_in_domain, gaussian_domain
from grainwright.inference.baselines.local import bilateral
from grainwright.inference.baselines.registry import (
    BASELINES,
    denoise,
    get_baseline,
    resolve_params,
)
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.evaluation.metrics import psnr
from grainwright.inference.noise.models import (
    GammaSpeckle,
    PoissonGaussianNoise,
    RayleighSpeckle,
)

NAMES = ["mean", "median", "gaussian", "bilateral", "tv", "wavelet", "nlm", "bm3d"]


def _camera(size: int = 64, top: int = 100, left: int = 200) -> np.ndarray:
    return (data.camera()[top : top + size, left : left + size] / 255.0).astype(np.float32)[:, :, None]


def _noisy(clean: np.ndarray, sigma: float, seed: int = 0) -> np.ndarray:
    return (clean + np.random.default_rng(seed).normal(0.0, sigma, clean.shape)).astype(np.float32)


def test_registry_has_the_plain_names():
    assert list(BASELINES) == NAMES
    for name, baseline in BASELINES.items():
        assert isinstance(baseline, Baseline) and baseline.name == name
        assert baseline.function.__doc__, f"{name} has no docstring naming its method"
        defaults = baseline.defaults(0.05)
        assert set(defaults) == set(baseline.parameter_names), name
        for parameter in baseline.parameters:
            assert parameter.unit and parameter.help


@pytest.mark.parametrize("name", NAMES)
def test_every_baseline_reduces_noise_with_defaults(name):
    clean = _camera()
    noisy = _noisy(clean, 0.1)
    out = denoise(name, noisy, 0.1)
    assert out.shape == noisy.shape and out.dtype == np.float32
    assert psnr(clean, out, 1.0) > psnr(clean, noisy, 1.0) + 3.0


@pytest.mark.parametrize("name", NAMES)
def test_every_grid_point_runs(name):
    image = _noisy(_camera(24), 0.1, seed=1)
    baseline = get_baseline(name)
    for kind in ("search", "calibration"):
        points = baseline.grid(kind)
        assert points, f"{name} has an empty {kind} grid"
        for point in points:
            assert np.all(np.isfinite(denoise(name, image, 0.1, **point)))


@pytest.mark.parametrize("name", NAMES)
def test_units_follow_the_data(name):
    # Parameters are in pixels or multiples of sigma, so denoise(a x + b, a sigma) = a denoise(x, sigma) + b.
    noisy = _noisy(_camera(40), 0.08, seed=2)
    base = denoise(name, noisy, 0.08)
    scaled = denoise(name, 20.0 * noisy - 5.0, 20.0 * 0.08, data_range=20.0)
    error = np.abs((scaled + 5.0) / 20.0 - base)
    if name == "bm3d":
        # float32 rounding may flip a coefficient (or a block match) lying right at a threshold.
        assert np.mean(error < 1e-3) > 0.99 and error.max() < 1e-2
    else:
        assert error.max() < 1e-4


def test_unequal_channel_sigmas_are_equalised():
    # Channel c with noise sigma_c is scaled to the mean sigma, filtered, and scaled back: equivalent to filtering
    # a copy of the channel that was brighter by mean / sigma_c.
    rng = np.random.default_rng(3)
    clean = np.repeat(_camera(48), 2, axis=2)
    sigmas = np.array([0.05, 0.15])
    noisy = (clean + rng.normal(0.0, 1.0, clean.shape) * sigmas).astype(np.float32)
    out = denoise("tv", noisy, sigmas)
    scale = sigmas.mean() / sigmas
    expected = denoise("tv", noisy * scale, sigmas.mean()) / scale
    np.testing.assert_allclose(out, expected, atol=1e-5)


def test_grayscale_two_dimensional_input_keeps_its_shape():
    noisy = _noisy(_camera(32), 0.1)[:, :, 0]
    assert denoise("median", noisy, 0.1).shape == noisy.shape


def test_clear_errors():
    image = _noisy(_camera(16), 0.1)
    with pytest.raises(ConfigError, match="did you mean bm3d"):
        denoise("bm3", image, 0.1)
    with pytest.raises(ConfigError, match="no parameter 'strenght'"):
        denoise("tv", image, 0.1, strenght=1.0)
    with pytest.raises(ConfigError, match="positive"):
        denoise("tv", image, 0.0)
    with pytest.raises(ConfigError, match="3 noise sigmas"):
        denoise("tv", image, [0.1, 0.1, 0.1])
    bad = image.copy()
    bad[0, 0, 0] = np.nan
    with pytest.raises(InputError, match="NaN"):
        denoise("tv", bad, 0.1)
    with pytest.raises(InputError, match="float"):
        denoise("tv", (image * 255).astype(np.uint8), 0.1)
    with pytest.raises(ConfigError, match="soft or hard"):
        denoise("wavelet", image, 0.1, mode="medium")
    with pytest.raises(ConfigError, match="opponent or per-channel"):
        denoise("bm3d", image, 0.1, colour="lab")


def test_resolve_params_overlays_defaults():
    params = resolve_params("nlm", 25 / 255, {"strength": 1.1})
    assert params["strength"] == 1.1 and params["patch_radius"] == 2


def _bilateral_by_definition(image: np.ndarray, width: float, range_width: float) -> np.ndarray:
    """Tomasi and Manduchi 1998, eq. for the bilateral filter, one pixel at a time (grayscale)."""
    radius = max(1, math.ceil(3 * width))
    padded = np.pad(image, radius, mode="reflect")
    out = np.empty_like(image)
    for y in range(image.shape[0]):
        for x in range(image.shape[1]):
            total = norm = 0.0
            for dy in range(-radius, radius + 1):
                for dx in range(-radius, radius + 1):
                    if dy * dy + dx * dx > radius * radius:
                        continue
                    value = padded[y + radius + dy, x + radius + dx]
                    weight = math.exp(-(dy * dy + dx * dx) / (2 * width**2)) * math.exp(
                        -((value - image[y, x]) ** 2) / (2 * range_width**2)
                    )
                    total += weight * value
                    norm += weight
            out[y, x] = total / norm
    return out


def test_bilateral_matches_the_definition():
    # Reference: the filter's definition (Tomasi and Manduchi 1998), evaluated directly, pixel by pixel.
    image = _noisy(_camera(12), 0.1, seed=4)
    ours = bilateral(image, 0.1, width=1.0, range_strength=2.0)[:, :, 0]
    np.testing.assert_allclose(ours, _bilateral_by_definition(image[:, :, 0], 1.0, 0.2), atol=1e-5)


def test_bilateral_with_a_huge_range_is_a_gaussian_filter():
    # Reference: SciPy's Gaussian filter, with the kernel cut to the same round window.
    image = _noisy(_camera(32), 0.1, seed=5)
    ours = bilateral(image, 0.1, width=1.0, range_strength=1e6)[:, :, 0]
    radius = 3
    yy, xx = np.mgrid[-radius : radius + 1, -radius : radius + 1]
    kernel = np.exp(-(yy**2 + xx**2) / 2.0) * (yy**2 + xx**2 <= radius**2)
    expected = ndimage.convolve(image[:, :, 0], kernel / kernel.sum(), mode="mirror")
    np.testing.assert_allclose(ours, expected, atol=1e-5)


def test_box_mean_and_median_match_scipy():
    # References: scipy.ndimage.uniform_filter and a median over an explicit disk footprint.
    image = _noisy(_camera(20), 0.1, seed=6)
    np.testing.assert_allclose(
        denoise("mean", image, 0.1, radius=2)[:, :, 0],
        ndimage.uniform_filter(image[:, :, 0], size=5, mode="reflect"), atol=1e-6,
    )
    cross = np.array([[0, 1, 0], [1, 1, 1], [0, 1, 0]], dtype=bool)
    np.testing.assert_allclose(
        denoise("median", image, 0.1, radius=1)[:, :, 0],
        ndimage.median_filter(image[:, :, 0], footprint=cross, mode="reflect"), atol=1e-6,
    )


# --- noise domains -------------------------------------------------------------------------------------------


def test_log_domain_constants_match_scipy_stats():
    # Reference: log-moments of the speckle laws computed numerically by scipy.stats.
    for looks in (1.0, 4.0, 10.0):
        domain = gaussian_domain(GammaSpeckle(looks=looks))
        law = stats.gamma(a=looks, scale=1.0 / looks)
        mean_log = law.expect(np.log)
        var_log = law.expect(lambda u: (np.log(u) - mean_log) ** 2)
        assert domain.sigma == pytest.approx(math.sqrt(var_log), rel=1e-4)
        # exp(log z - bias) of a unit signal gives back 1 when z = E[log u]:
        assert domain.inverse(np.array([mean_log + math.log(1 + 1 / 256)], dtype=np.float32))[0] == pytest.approx(
            1.0, rel=1e-4
        )
    law = stats.rayleigh(scale=math.sqrt(2.0 / math.pi))
    assert law.mean() == pytest.approx(1.0)
    mean_log = law.expect(np.log)
    domain = gaussian_domain(RayleighSpeckle())
    assert domain.sigma == pytest.approx(math.sqrt(law.expect(lambda u: (np.log(u) - mean_log) ** 2)), rel=1e-4)
    assert domain.inverse(np.array([mean_log + math.log(1 + 1 / 256)], dtype=np.float32))[0] == pytest.approx(
        1.0, rel=1e-4
    )


def test_speckle_log_domain_keeps_the_mean_and_beats_the_raw_image():
    rng = np.random.default_rng(7)
    noise = GammaSpeckle(looks=4.0)
    # A flat patch: after a wide box mean in the log domain, the bias correction returns the signal's mean level.
    flat = np.full((96, 96, 1), 0.5, dtype=np.float32)
    out = denoise_in_domain("mean", noise.sample(flat, rng), noise, radius=4)
    assert float(out[8:-8, 8:-8].mean()) == pytest.approx(0.5, rel=0.02)
    # On structure, filtering in the log domain beats the same filter on the raw image with one global sigma
    # (speckle is multiplicative: its level follows the signal, which a single sigma cannot describe).
    clean = 0.05 + 0.9 * _camera(96)
    noisy = noise.sample(clean, rng)
    global_sigma = float(np.sqrt(np.mean(noise.sigma_map(clean) ** 2)))
    in_domain = psnr(clean, denoise_in_domain("bm3d", noisy, noise), 1.0)
    raw = psnr(clean, denoise("bm3d", noisy, global_sigma), 1.0)
    assert in_domain > raw + 1.0


def test_poisson_gaussian_goes_through_anscombe():
    # Makitalo and Foi 2013 run BM3D in the generalized-Anscombe domain for Poisson-Gaussian data; it should beat
    # BM3D on the raw image with one global sigma, which over-smooths dark areas and under-smooths bright ones.
    rng = np.random.default_rng(8)
    noise = PoissonGaussianNoise(gain=0.02, read=0.01)
    gains = []
    for clean in (_camera(96), (data.coins()[50:146, 50:146] / 255.0).astype(np.float32)[:, :, None]):
        noisy = noise.sample(clean, rng)
        global_sigma = float(np.sqrt(np.mean(noise.sigma_map(clean) ** 2)))
        gains.append(
            psnr(clean, denoise_in_domain("bm3d", noisy, noise), 1.0)
            - psnr(clean, denoise("bm3d", noisy, global_sigma), 1.0)
        )
    assert np.mean(gains) > 0.3, gains
    domain = gaussian_domain(noise.to_dict())
    assert domain.kind == "anscombe" and domain.sigma == 1.0


def test_gaussian_domain_is_the_identity_and_unknown_noise_is_refused():
    image = _noisy(_camera(16), 0.1)
    np.testing.assert_array_equal(denoise_in_domain("gaussian", image, 0.1), denoise("gaussian", image, 0.1))
    with pytest.raises(ConfigError, match="impulse"):
        gaussian_domain({"kind": "impulse", "fraction": 0.1})


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("shape", [(13, 17, 3), (7, 9, 1), (2, 3, 2)])
def test_odd_shapes_and_channel_counts(name, shape):
    image = np.random.default_rng(9).random(shape).astype(np.float32)
    out = denoise(name, image, 0.1)
    assert out.shape == shape and out.dtype == np.float32 and np.all(np.isfinite(out))
