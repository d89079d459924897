"""Normalisation: exact round trips for integer dtypes, serialisation, and the variance-stabilising transforms."""
from __future__ import annotations

import json

import numpy as np
import pytest

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images.normalization import Normalization


@pytest.mark.parametrize("dtype", ["uint8", "uint16", "int8", "int16"])
def test_every_integer_value_survives_the_round_trip(dtype):
    info = np.iinfo(dtype)
    every_value = np.arange(info.min, int(info.max) + 1).astype(dtype).reshape(-1, 1, 1)
    norm = Normalization.for_array(every_value, bit_depth=None if info.min < 0 else info.bits)
    working = norm.to_working(every_value)
    assert working.dtype == np.float32
    assert working.min() >= 0.0 and working.max() <= 1.0
    np.testing.assert_array_equal(norm.from_working(working), every_value)


@pytest.mark.parametrize("bits", [10, 12, 14])
def test_effective_bit_depth_sets_the_range(bits):
    data = np.array([[[0], [2**bits - 1]]], dtype=np.uint16)
    norm = Normalization.for_array(data)
    assert norm.bit_depth == bits and norm.high == 2**bits - 1
    np.testing.assert_array_equal(norm.to_working(data).ravel(), [0.0, 1.0])
    every_value = np.arange(2**bits, dtype=np.uint16).reshape(-1, 1, 1)
    np.testing.assert_array_equal(norm.from_working(norm.to_working(every_value)), every_value)


def test_user_bit_depth_overrides_detection_and_output_is_clipped_to_it():
    dark = np.array([[[100]]], dtype=np.uint16)
    norm = Normalization.for_array(dark, bit_depth=12)
    assert norm.high == 4095
    np.testing.assert_array_equal(norm.from_working(np.array([-0.5, 2.0], np.float32)), [0, 4095])


def test_noisy_unit_range_float_data_keeps_zero_to_one():
    noisy = np.array([[[-0.08], [0.5], [1.1]]], dtype=np.float32)
    norm = Normalization.for_array(noisy)
    assert (norm.low, norm.high) == (0.0, 1.0)
    np.testing.assert_allclose(norm.to_working(noisy), noisy)


def test_float_data_and_float_output_are_not_clipped():
    data = np.array([[[-3.0], [5.0]]], dtype=np.float32)
    norm = Normalization.for_array(data)
    assert (norm.low, norm.high) == (-3.0, 5.0)
    assert norm.from_working(np.array([1.5], np.float32))[0] == pytest.approx(9.0)


def test_dict_round_trip_is_json_serialisable():
    norm = Normalization.for_array(np.zeros((4, 4, 3), np.uint16), bit_depth=12).with_anscombe(0.01, 0.02)
    text = json.dumps(norm.to_dict())
    assert Normalization.from_dict(json.loads(text)) == norm
    assert norm.channel_order == "rgb" and norm.channels == 3
    with pytest.raises(ConfigError, match="unknown key"):
        Normalization.from_dict({**norm.to_dict(), "colour": "red"})


def test_anscombe_keeps_the_signal_range_in_zero_to_one_and_inverts():
    norm = Normalization.for_array(np.zeros((1, 1, 1), np.uint16), bit_depth=12).with_anscombe(0.01, 0.02)
    native = np.arange(4096, dtype=np.uint16)
    working = norm.to_working(native)
    assert working[0] == pytest.approx(0.0, abs=1e-6) and working[-1] == pytest.approx(1.0, abs=1e-6)
    assert np.all(np.diff(working) > 0)
    # The exact unbiased inverse maps E[f(z)], not f(z), back to the signal: it differs from the algebraic
    # inverse by about a quarter of a count (Makitalo and Foi 2011), never by more than half a count here.
    counts_per_native = 1.0 / (0.01 * 4095)
    back = norm.from_working_float(working)
    assert np.abs(back - native).max() * counts_per_native < 0.5


def test_working_noise_sigma_matches_simulated_poisson_gaussian_noise():
    gain, read = 0.005, 0.01
    norm = Normalization.for_array(np.zeros((1, 1, 1), np.float32)).with_anscombe(gain, read)
    rng = np.random.default_rng(3)
    signal = np.full(200_000, 0.3)
    noisy = gain * rng.poisson(signal / gain) + read * rng.standard_normal(signal.size)
    measured = norm.to_working(noisy.astype(np.float32)).std()
    assert measured == pytest.approx(norm.working_noise_sigma(), rel=0.03)


def test_log_transform_for_speckle():
    # Variance of log of a Gamma(L, 1/L) variable is polygamma(1, L) (trigamma; scipy.special as reference).
    looks = 4.0
    norm = Normalization.for_array(np.zeros((1, 1, 1), np.float32)).with_log(epsilon=1e-3, looks=looks)
    rng = np.random.default_rng(4)
    for level in (0.2, 0.7):
        noisy = (level * rng.gamma(looks, 1 / looks, 200_000)).astype(np.float32)
        assert norm.to_working(noisy).std() == pytest.approx(norm.working_noise_sigma(), rel=0.05)
    values = np.linspace(0, 1, 101, dtype=np.float32)
    np.testing.assert_allclose(norm.from_working_float(norm.to_working(values)), values, atol=1e-5)


def test_empty_range_and_unknown_transform_are_refused():
    with pytest.raises(ConfigError):
        Normalization("uint8", 8, 5.0, 5.0, 1)
    with pytest.raises(ConfigError, match="unknown transform"):
        Normalization("uint8", 8, 0.0, 255.0, 1, transform={"kind": "sqrt"})


from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402
from hypothesis.extra.numpy import arrays  # noqa: E402


@st.composite
def _integer_images(draw):
    dtype = draw(st.sampled_from(["uint8", "uint16", "int8", "int16"]))
    shape = draw(st.tuples(st.integers(1, 6), st.integers(1, 6), st.integers(1, 4)))
    image = draw(arrays(np.dtype(dtype), shape))
    bits = None
    if dtype == "uint16":
        needed = max(int(image.max()).bit_length(), 1)
        bits = draw(st.integers(needed, 16))
    return image, bits


@settings(max_examples=200, deadline=None)
@given(_integer_images())
def test_round_trip_is_exact_for_any_integer_image_and_bit_depth(case):
    image, bits = case
    norm = Normalization.for_array(image, bit_depth=bits)
    np.testing.assert_array_equal(norm.from_working(norm.to_working(image)), image)
    assert Normalization.from_dict(norm.to_dict()) == norm
