"""The torch mirror of the normalisation (inside every exported graph) against the numpy normalisation."""
from __future__ import annotations

import numpy as np
import pytest
import torch

from grainwright.inference.images.normalization import Normalization
from grainwright.models.working_range import WorkingRange

BASE = Normalization("uint16", 12, 0.0, 4095.0, 1)
CASES = {
    "none": BASE,
    "anscombe": BASE.with_anscombe(gain=0.004, read=0.003),
    "log": BASE.with_log(epsilon=1.0 / 256.0),
    "log-noisy-targets": BASE.with_log(epsilon=1.0 / 256.0, looks=4.0, noisy_targets=True),
}


@pytest.mark.parametrize("kind", sorted(CASES))
def test_to_working_matches_numpy(kind):
    normalization = CASES[kind]
    native = np.linspace(-200.0, 4400.0, 20001, dtype=np.float32)  # beyond both ends on purpose
    expected = normalization.to_working(native)
    actual = WorkingRange(normalization.to_dict()).to_working(torch.from_numpy(native)).numpy()
    np.testing.assert_allclose(actual, expected, rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("kind", sorted(CASES))
def test_from_working_float_matches_numpy(kind):
    normalization = CASES[kind]
    working = np.linspace(-0.5, 1.5, 20001, dtype=np.float32)  # network outputs may leave [0, 1]
    expected = normalization.from_working_float(working)
    actual = WorkingRange(normalization).from_working_float(torch.from_numpy(working)).numpy()
    np.testing.assert_allclose(actual / normalization.full_range, expected / normalization.full_range,
                               rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("kind", sorted(CASES))
def test_round_trip_inside_the_range(kind):
    normalization = CASES[kind]
    native = torch.linspace(0.0, 4095.0, 4096)
    working_range = WorkingRange(normalization)
    back = working_range.from_working_float(working_range.to_working(native))
    if kind == "log-noisy-targets":
        # The inverse removes the speckle's log-domain mean: a noise-free round trip of x + epsilon (the log's
        # offset) comes back brighter by exp(-bias).
        t = normalization.transform
        x = native / normalization.full_range
        expected = ((x + t["epsilon"]) * float(np.exp(-t["bias"])) - t["epsilon"]) * normalization.full_range
        assert torch.allclose(back, expected, rtol=1e-4, atol=0.05)
    elif kind == "anscombe":
        # The exact unbiased inverse is not the algebraic inverse: it undoes E[f(z)], not f (Makitalo and Foi
        # 2011), so a noise-free round trip is close only where counts are high.
        back, native = back[2048:], native[2048:]
        assert torch.allclose(back, native, rtol=0.01)
    else:
        assert torch.allclose(back, native, atol=0.05)


def test_noise_sigma_without_transform_is_divided_by_the_range():
    working_range = WorkingRange(BASE)
    sigma = torch.full((1, 1, 4, 4), 40.95)
    assert torch.allclose(working_range.noise_sigma_to_working(sigma, torch.zeros(1, 1, 4, 4)), sigma / 4095.0)


def test_noise_sigma_through_anscombe_matches_monte_carlo():
    """The delta-method conversion agrees with the spread of transformed Poisson-Gaussian samples.

    Reference: the generalized Anscombe transform stabilises Poisson-Gaussian noise to unit variance
    (Murtagh, Starck and Bijaoui 1995; Makitalo and Foi 2013), here rescaled by ``1 / scale``.
    """
    gain, read = 0.004, 0.003  # working units
    normalization = BASE.with_anscombe(gain, read)
    working_range = WorkingRange(normalization)
    rng = np.random.default_rng(0)
    for signal in (0.1, 0.4, 0.9):
        counts = rng.poisson(signal / gain, 200_000)
        noisy = (gain * counts + rng.normal(0.0, read, counts.shape)) * 4095.0
        measured = float(np.std(normalization.to_working(noisy.astype(np.float32))))
        sigma_native = torch.tensor(np.sqrt(gain * signal + read**2) * 4095.0, dtype=torch.float32)
        predicted = working_range.noise_sigma_to_working(sigma_native.reshape(1, 1, 1, 1),
                                                         torch.full((1, 1, 1, 1), signal * 4095.0)).item()
        assert predicted == pytest.approx(measured, rel=0.03)
        assert predicted == pytest.approx(normalization.working_noise_sigma(), rel=0.03)
