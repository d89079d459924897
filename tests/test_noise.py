"""Noise models: moments against scipy.stats, seeding, TOML descriptions."""
from __future__ import annotations

import numpy as np
import pytest

from grainwright.inference.errors import ConfigError
from grainwright.inference.noise import NOISE_MODELS, load_noise, noise_from_dict, save_noise


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
