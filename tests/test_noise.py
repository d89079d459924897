"""Noise models: moments against scipy.stats, seeding, TOML descriptions."""
from __future__ import annotations

import numpy as np
import pytest

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.noise.models import (
    NOISE_MODELS,
    load_noise,
    noise_from_dict,
    save_noise,
)


def test_registry_holds_the_documented_kinds():
    assert {"gaussian", "poisson", "poisson-gaussian", "speckle-gamma", "speckle-rayleigh", "impulse", "uniform",
            "laplacian", "exponential", "banding", "mixture"} <= set(NOISE_MODELS)


def test_toml_example_from_the_docs(tmp_path):
    path = tmp_path / "noise.toml"
    path.write_text('kind = "poisson-gaussian"\ngain = 0.01\nread = 0.02\n')
    model = load_noise(path)
    assert model.kind == "poisson-gaussian" and model.gain == 0.01 and model.read == 0.02
    save_noise(model, tmp_path / "again.toml")
    assert load_noise(tmp_path / "again.toml") == model


def test_native_units_with_range():
    model = noise_from_dict({"kind": "gaussian", "sigma_native": 10, "range_native": 255})
    assert model.sigma == pytest.approx(10 / 255)
    with pytest.raises(ConfigError, match="range_native"):
        noise_from_dict({"kind": "gaussian", "sigma_native": 10})


def test_bad_descriptions_are_refused(tmp_path):
    with pytest.raises(ConfigError, match="unknown noise kind"):
        noise_from_dict({"kind": "pink"})
    with pytest.raises(ConfigError, match="unknown key"):
        noise_from_dict({"kind": "gaussian", "sigma": 0.1, "sigmaa": 0.1})
    with pytest.raises(ConfigError, match="positive"):
        noise_from_dict({"kind": "poisson-gaussian", "gain": -1, "read": 0.1})
    (tmp_path / "broken.toml").write_text("kind = \n")
    with pytest.raises(Exception, match="broken.toml"):
        load_noise(tmp_path / "broken.toml")


def test_sampling_is_seeded_and_float32():
    model = noise_from_dict({"kind": "poisson-gaussian", "gain": 0.01, "read": 0.02})
    clean = np.full((16, 16, 1), 0.4, np.float32)
    first = model.sample(clean, np.random.default_rng(5))
    assert first.dtype == np.float32 and first.shape == clean.shape
    np.testing.assert_array_equal(first, model.sample(clean, np.random.default_rng(5)))


# ----------------------------------------------------------------------------------- moments vs scipy.stats
from scipy import stats  # noqa: E402

SAMPLES = 200_000


def _moments(values: np.ndarray) -> tuple[float, float, float]:
    values = values.astype(np.float64).ravel()
    return float(values.mean()), float(values.var()), float(stats.skew(values))


def _check(model_dict: dict, clean_level: float, reference, seed: int = 0) -> None:
    model = noise_from_dict(model_dict)
    clean = np.full((SAMPLES // 100, 100, 1), clean_level, np.float32)
    mean, variance, skew = _moments(model.sample(clean, np.random.default_rng(seed)))
    ref_mean, ref_var, ref_skew = (float(v) for v in reference.stats(moments="mvs"))
    assert mean == pytest.approx(ref_mean, abs=5 * np.sqrt(ref_var / SAMPLES) + 1e-6)
    assert variance == pytest.approx(ref_var, rel=0.03)
    assert skew == pytest.approx(ref_skew, abs=0.05 + 0.05 * abs(ref_skew))
    sigma = model.sigma_map(clean)
    if sigma is not None:
        assert float(sigma.mean()) == pytest.approx(np.sqrt(ref_var), rel=1e-4)


def test_gaussian_moments():
    _check({"kind": "gaussian", "sigma": 0.05}, 0.3, stats.norm(loc=0.3, scale=0.05))


def test_poisson_moments():
    # gain * Poisson(clean / gain): scipy.stats.poisson scaled by the gain.
    gain, level = 0.02, 0.1
    counts = stats.poisson(mu=level / gain)
    scaled = _Scaled(counts, gain)
    _check({"kind": "poisson", "gain": gain}, level, scaled)


def test_poisson_gaussian_moments():
    # Cumulants add: Poisson part from scipy.stats.poisson, Gaussian part from scipy.stats.norm.
    gain, read, level = 0.01, 0.02, 0.05
    _check({"kind": "poisson-gaussian", "gain": gain, "read": read}, level,
           _Sum(_Scaled(stats.poisson(mu=level / gain), gain), stats.norm(scale=read)))


def test_gamma_speckle_moments():
    looks, level = 4.0, 0.6
    _check({"kind": "speckle-gamma", "looks": looks}, level, stats.gamma(a=looks, scale=level / looks))


def test_rayleigh_speckle_moments():
    level = 0.5
    _check({"kind": "speckle-rayleigh"}, level, stats.rayleigh(scale=level * np.sqrt(2 / np.pi)))
    assert stats.rayleigh(scale=np.sqrt(2 / np.pi)).mean() == pytest.approx(1.0)  # unit-mean speckle


def test_uniform_moments():
    _check({"kind": "uniform", "width": 0.1}, 0.4, stats.uniform(loc=0.35, scale=0.1))


def test_laplacian_moments():
    sigma = 0.04
    _check({"kind": "laplacian", "sigma": sigma}, 0.5, stats.laplace(loc=0.5, scale=sigma / np.sqrt(2)))


@pytest.mark.parametrize("centred", [True, False])
def test_exponential_moments(centred):
    scale = 0.03
    _check({"kind": "exponential", "scale": scale, "centred": centred}, 0.2,
           stats.expon(loc=0.2 - (scale if centred else 0.0), scale=scale))


def test_impulse_fraction_and_salt_share():
    model = noise_from_dict({"kind": "impulse", "fraction": 0.05, "salt_share": 0.3})
    clean = np.full((400, 500, 1), 0.5, np.float32)
    noisy = model.sample(clean, np.random.default_rng(1))
    salt, pepper = int((noisy == 1.0).sum()), int((noisy == 0.0).sum())
    # Binomial counts (scipy.stats.binom) within their 99.99% intervals.
    for count, p in ((salt, 0.05 * 0.3), (pepper, 0.05 * 0.7)):
        low, high = stats.binom(clean.size, p).interval(0.9999)
        assert low <= count <= high
    assert np.all(noisy[(noisy != 1.0) & (noisy != 0.0)] == 0.5)


def test_banding_is_a_fixed_pattern_when_seeded():
    model = noise_from_dict({"kind": "banding", "row_sigma": 0.02, "column_sigma": 0.01, "pattern_seed": 3})
    clean = np.zeros((300, 400, 1), np.float32)
    first = model.sample(clean, np.random.default_rng(1))
    second = model.sample(clean, np.random.default_rng(2))
    np.testing.assert_array_equal(first, second)  # same sensor pattern for every frame
    rows = first[:, :, 0].mean(axis=1)
    columns = first[:, :, 0].mean(axis=0)
    # Offsets are draws of scipy.stats.norm(scale=row_sigma / column_sigma): chi-square interval on the spread.
    for values, sigma in ((rows - rows.mean(), 0.02), (columns - columns.mean(), 0.01)):
        n = values.size
        low, high = stats.chi2(n - 1).interval(0.9999)
        assert low <= (values**2).sum() / sigma**2 <= high
    unseeded = noise_from_dict({"kind": "banding", "row_sigma": 0.02})
    assert not np.array_equal(unseeded.sample(clean, np.random.default_rng(1)),
                              unseeded.sample(clean, np.random.default_rng(2)))


def test_mixture_adds_independent_noises():
    # Gaussian then Laplacian: variances add (scipy.stats for each part).
    model = noise_from_dict({"kind": "mixture", "components": [
        {"kind": "gaussian", "sigma": 0.03}, {"kind": "laplacian", "sigma": 0.04}]})
    clean = np.full((SAMPLES // 100, 100, 1), 0.5, np.float32)
    _, variance, _ = _moments(model.sample(clean, np.random.default_rng(4)))
    expected = stats.norm(scale=0.03).var() + stats.laplace(scale=0.04 / np.sqrt(2)).var()
    assert variance == pytest.approx(expected, rel=0.03)
    assert float(model.sigma_map(clean).mean()) == pytest.approx(np.sqrt(expected), rel=1e-5)
    assert noise_from_dict(model.to_dict()) == model


class _Scaled:
    """A scipy.stats distribution multiplied by a constant (moments scale as c, c**2, skew unchanged)."""

    def __init__(self, dist, factor: float):
        self.dist, self.factor = dist, factor

    def stats(self, moments="mvs"):
        mean, var, skew = self.dist.stats(moments="mvs")
        return mean * self.factor, var * self.factor**2, skew


class _Sum:
    """Sum of independent variables from their scipy.stats moments (means, variances and third cumulants add)."""

    def __init__(self, *dists):
        self.dists = dists

    def stats(self, moments="mvs"):
        parts = [d.stats(moments="mvs") for d in self.dists]
        mean = sum(float(p[0]) for p in parts)
        var = sum(float(p[1]) for p in parts)
        third = sum(float(p[2]) * float(p[1]) ** 1.5 for p in parts)
        return mean, var, third / var**1.5
