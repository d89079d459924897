"""Variance-stabilising transforms against the properties the papers report."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from grainwright.inference.images.transforms import (
    anscombe_forward,
    anscombe_inverse_algebraic,
    anscombe_inverse_exact,
    log_forward,
    log_inverse,
    speckle_log_mean,
)

RNG = np.random.default_rng(99)


def _poisson_gaussian(mean_counts: float, gain: float, read: float, size: int) -> np.ndarray:
    return gain * RNG.poisson(mean_counts, size) + read * RNG.standard_normal(size)


@pytest.mark.parametrize("gain,read", [(0.5, 0.8), (2.0, 3.0), (0.01, 0.02)])
@pytest.mark.parametrize("mean_counts", [10, 30, 100, 1000])
def test_generalized_anscombe_gives_unit_variance_from_ten_counts(gain, read, mean_counts):
    # Murtagh, Starck and Bijaoui 1995 / Makitalo and Foi 2013: unit variance for large enough counts.
    z = _poisson_gaussian(mean_counts, gain, read, 200_000)
    assert anscombe_forward(z, gain, read).var() == pytest.approx(1.0, rel=0.05)


@pytest.mark.parametrize("gain,read", [(0.5, 0.3), (2.0, 1.0)])
def test_exact_unbiased_inverse_beats_the_algebraic_one_at_low_counts(gain, read):
    # Makitalo and Foi 2011/2013 report the algebraic inverse biased at low counts and the exact unbiased
    # inverse (here its closed-form approximation) nearly unbiased. E[f(z)] comes from 400k samples.
    for mean_counts in (1.0, 2.0, 3.0, 5.0):
        expected = anscombe_forward(_poisson_gaussian(mean_counts, gain, read, 400_000), gain, read).mean()
        truth = gain * mean_counts
        exact_bias = abs(anscombe_inverse_exact(expected, gain, read) - truth)
        algebraic_bias = abs(anscombe_inverse_algebraic(expected, gain, read) - truth)
        assert exact_bias < algebraic_bias
        assert exact_bias < 0.1 * truth


def test_exact_inverse_is_non_negative_and_finite_near_zero():
    d = np.linspace(0.0, 3.0, 301)
    values = anscombe_inverse_exact(d, 1.0, 0.0)
    assert np.all(np.isfinite(values)) and np.all(values >= 0.0)
    assert np.all(np.diff(values) >= -1e-12)  # monotone, so the network's ordering survives


def test_algebraic_inverse_undoes_the_forward_transform():
    z = np.linspace(0.0, 50.0, 101)
    np.testing.assert_allclose(anscombe_inverse_algebraic(anscombe_forward(z, 1.5, 0.7), 1.5, 0.7), z, atol=1e-9)


@pytest.mark.parametrize("looks", [1.0, 4.0, 16.0])
def test_log_turns_gamma_speckle_into_constant_variance(looks):
    # Var(log u) for u ~ Gamma(L, 1/L) is polygamma(1, L) (trigamma), independent of the signal
    # (scipy.special as the reference for the trigamma function, scipy.stats for the gamma law).
    expected = float(special.polygamma(1, looks))
    for signal in (0.1, 0.5, 2.0):
        speckled = signal * stats.gamma(a=looks, scale=1 / looks).rvs(200_000, random_state=RNG)
        assert log_forward(speckled, 1e-9).var() == pytest.approx(expected, rel=0.03)


def test_log_round_trip():
    z = np.linspace(0.0, 10.0, 51)
    np.testing.assert_allclose(log_inverse(log_forward(z, 1e-3), 1e-3), z, atol=1e-9)


@pytest.mark.parametrize("looks", [1.0, 4.0, 10.0, 64.0])
def test_speckle_log_mean_is_digamma_minus_log_and_matches_simulated_speckle(looks):
    # E[ln u] = psi(L) - ln L for u ~ Gamma(L, 1/L): scipy.special.digamma as the reference for psi, and the
    # sample mean of simulated speckle (scipy.stats' gamma law) as an independent check.
    assert speckle_log_mean(looks) == pytest.approx(float(special.digamma(looks)) - np.log(looks), rel=1e-12)
    speckle = stats.gamma(a=looks, scale=1 / looks).rvs(400_000, random_state=RNG)
    standard_error = np.sqrt(special.polygamma(1, looks) / speckle.size)
    assert abs(np.log(speckle).mean() - speckle_log_mean(looks)) < 5 * standard_error


def test_speckle_log_mean_at_four_looks_darkens_by_twelve_percent_if_left_in():
    # About -0.13 at four looks (digamma(4) = 11/6 - Euler's constant, a closed form), a factor exp(-0.130) = 0.878.
    assert speckle_log_mean(4.0) == pytest.approx(11.0 / 6.0 - np.euler_gamma - np.log(4.0), abs=1e-12)
    assert np.exp(speckle_log_mean(4.0)) == pytest.approx(0.878, abs=0.001)
    with pytest.raises(ValueError, match="looks must be positive"):
        speckle_log_mean(0.0)


def test_log_inverse_with_the_bias_recovers_the_signal_from_the_mean_of_logged_speckle():
    # A perfect denoiser trained on noisy log-domain targets returns the mean of the log; exp of it is too dark
    # by exp(psi(L) - ln L), and removing the bias gives the signal back.
    signal, looks = 0.4, 4.0
    speckled = signal * stats.gamma(a=looks, scale=1 / looks).rvs(400_000, random_state=RNG)
    mean_log = log_forward(speckled, 1e-9).mean()
    assert log_inverse(mean_log, 1e-9) == pytest.approx(signal * 0.878, rel=0.01)
    assert log_inverse(mean_log, 1e-9, speckle_log_mean(looks)) == pytest.approx(signal, rel=0.005)
