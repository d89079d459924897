"""Training schemes: their random draws and losses, checked against the papers' definitions."""
from __future__ import annotations

import numpy as np
import pytest
import torch

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.noise.models import noise_from_dict
from grainwright.trainer.config import defaults
from grainwright.trainer.schemes.masked import Masked, draw_mask, replace_masked
from grainwright.trainer.schemes.neighbor2neighbor import Neighbor2Neighbor, subsample
from grainwright.trainer.schemes.noise2noise import Noise2Noise
from grainwright.trainer.schemes.recorrupted import Recorrupted
from grainwright.trainer.schemes.registry import (
    SCHEMES,
    check_scheme_fits,
    choose_scheme,
)
from grainwright.trainer.schemes.supervised import Supervised

torch.set_num_threads(1)


class Identity(torch.nn.Module):
    takes_noise_map = False

    def forward(self, image):
        return image


def _positions(count: int, size: int) -> np.ndarray:
    """Pixel value = flat position within the patch, so a drawn pixel tells where it came from."""
    plane = np.arange(size * size, dtype=np.float32).reshape(size, size)
    return np.broadcast_to(plane, (count, 1, size, size)).copy()


def test_registry_has_the_nine_schemes():
    assert set(SCHEMES) == {"supervised", "noise2noise", "masked", "neighbor2neighbor", "recorrupted", "sure",
                            "neighbor2neighbor-stack", "noise2noise-stack", "recorrupted-stack"}


@pytest.mark.parametrize("layout, noise_known, estimated, expected", [
    ("clean-only", True, False, "supervised"),
    ("clean-noisy", False, False, "supervised"),
    ("noisy-pairs", False, True, "noise2noise"),
    ("noisy-stacks", False, True, "noise2noise"),
    ("noisy-only", True, False, "recorrupted"),
    ("noisy-only", False, True, "recorrupted"),
    ("noisy-only", False, False, "neighbor2neighbor"),
])
def test_auto_choice_follows_the_layout(layout, noise_known, estimated, expected):
    name, reason = choose_scheme(layout, noise_known, estimated, known_kind="gaussian" if noise_known else None)
    assert name == expected
    assert "found" in reason


@pytest.mark.parametrize("kind, expected", [("poisson-gaussian", "recorrupted"), ("poisson", "recorrupted"),
                                            ("speckle-gamma", "neighbor2neighbor"), ("uniform", "neighbor2neighbor")])
def test_a_noise_description_leads_to_recorrupted_only_for_noise_gaussian_in_the_working_domain(kind, expected):
    # Recorrupted-to-Recorrupted (Pang et al. 2021) draws Gaussian recorruption: its input and target noise are
    # independent only for Gaussian noise (Poisson-Gaussian after the generalized Anscombe transform).
    name, reason = choose_scheme("noisy-only", True, False, known_kind=kind)
    assert name == expected
    if expected == "neighbor2neighbor":
        assert f"{kind} noise" in reason and "not Gaussian in the working domain" in reason


def test_auto_without_noise_description_for_clean_images_is_an_error():
    with pytest.raises(ConfigError, match="no noise description"):
        choose_scheme("clean-only", False, False)


def test_contradicting_scheme_says_what_was_found():
    with pytest.raises(ConfigError, match=r"'noise2noise' needs .*noisy-a/.* but the data folder holds single noisy "
                       r"images; schemes that fit: masked, neighbor2neighbor, recorrupted"):
        check_scheme_fits("noise2noise", "noisy-only")
    with pytest.raises(ConfigError, match="clean images only"):
        check_scheme_fits("recorrupted", "clean-only")


def test_supervised_draws_fresh_noise_of_the_model():
    config = defaults()
    scheme = Supervised(config, noise_from_dict({"kind": "gaussian", "sigma": 0.1}))
    clean = {"clean": np.full((8, 1, 32, 32), 0.5, dtype=np.float32)}
    rng = np.random.default_rng(0)
    first, second = scheme.prepare(clean, rng), scheme.prepare(clean, rng)
    assert not np.array_equal(first["noisy"], second["noisy"])
    assert np.std(first["noisy"] - 0.5) == pytest.approx(0.1, rel=0.05)
    loss = scheme.loss(Identity(), {k: torch.from_numpy(v) for k, v in first.items()}, 0.0)
    assert float(loss) == pytest.approx(np.mean((first["noisy"] - 0.5) ** 2), rel=1e-5)


def test_noise2noise_keeps_each_pair_and_swaps_roles():
    a = np.random.default_rng(0).random((64, 1, 8, 8), dtype=np.float32)
    b = a + 1.0
    batch = Noise2Noise(defaults()).prepare({"noisy": a, "noisy_b": b}, np.random.default_rng(1))
    assert np.allclose(np.abs(batch["noisy"] - batch["target"]), 1.0)
    swapped = (batch["noisy"] > batch["target"]).all(axis=(1, 2, 3))
    assert 10 < swapped.sum() < 54


def test_grid_mask_has_one_pixel_per_cell():
    # Noise2Void's stratified sampling: one masked pixel per cell of edge 1/sqrt(fraction).
    mask = draw_mask(np.random.default_rng(0), 4, 40, 40, fraction=0.04, grid=True)
    cells = mask.reshape(4, 8, 5, 8, 5).sum(axis=(2, 4))
    assert (cells == 1).all()
    random = draw_mask(np.random.default_rng(0), 64, 40, 40, fraction=0.04, grid=False)
    assert random.mean() == pytest.approx(0.04, rel=0.1)


def test_neighbour_replacement_takes_another_pixel_of_the_5x5_window():
    noisy = _positions(16, 20)
    rng = np.random.default_rng(3)
    mask = draw_mask(rng, 16, 20, 20, 0.05, True)
    replaced = replace_masked(noisy, mask, "neighbor", rng)
    n, rows, cols = np.nonzero(mask)
    source_rows, source_cols = np.divmod(replaced[n, 0, rows, cols].astype(int), 20)
    assert np.all((np.abs(source_rows - rows) <= 2) & (np.abs(source_cols - cols) <= 2))
    assert not np.any((source_rows == rows) & (source_cols == cols))
    np.testing.assert_array_equal(replaced[~np.broadcast_to(mask[:, None], noisy.shape)], noisy[~np.broadcast_to(mask[:, None], noisy.shape)])


def test_masked_loss_sees_only_masked_pixels():
    config = defaults()
    scheme = Masked(config)
    noisy = np.random.default_rng(4).random((4, 1, 16, 16), dtype=np.float32)
    batch = {k: torch.from_numpy(v) for k, v in scheme.prepare({"noisy": noisy}, np.random.default_rng(5)).items()}
    output = torch.zeros_like(batch["noisy"], requires_grad=True)

    class Fixed(torch.nn.Module):
        takes_noise_map = False

        def forward(self, image):
            return output

    scheme.loss(Fixed(), batch, 0.0).backward()
    touched = output.grad != 0
    assert torch.equal(touched, batch["mask"].bool() & (batch["noisy"] != 0))


def test_neighbor2neighbor_subsamples_adjacent_pixels_of_each_cell():
    noisy = _positions(8, 16)
    batch = Neighbor2Neighbor(defaults()).prepare({"noisy": noisy}, np.random.default_rng(6))
    tensors = {k: torch.from_numpy(v) for k, v in batch.items()}
    first = subsample(tensors["noisy"], tensors["first"]).numpy().astype(int)
    second = subsample(tensors["noisy"], tensors["second"]).numpy().astype(int)
    assert first.shape == (8, 1, 8, 8)
    (r1, c1), (r2, c2) = np.divmod(first, 16), np.divmod(second, 16)
    cell = np.arange(8)
    assert np.all(r1 // 2 == cell[:, None]) and np.all(c1 // 2 == cell[None, :])  # from its own 2x2 cell
    assert np.all(r2 // 2 == cell[:, None]) and np.all(c2 // 2 == cell[None, :])
    assert np.all(np.abs(r1 - r2) + np.abs(c1 - c2) == 1)  # adjacent, never diagonal


def test_neighbor2neighbor_regulariser_vanishes_for_the_identity():
    # With f = identity, f(g1(y)) - g2(y) equals g1(f(y)) - g2(f(y)): only the reconstruction term is left
    # (Huang et al. 2021, eq. 8).
    noisy = np.random.default_rng(7).random((4, 1, 16, 16), dtype=np.float32)
    scheme = Neighbor2Neighbor(defaults())
    tensors = {k: torch.from_numpy(v) for k, v in scheme.prepare({"noisy": noisy}, np.random.default_rng(8)).items()}
    first = subsample(tensors["noisy"], tensors["first"])
    second = subsample(tensors["noisy"], tensors["second"])
    expected = torch.mean((first - second) ** 2)
    assert float(scheme.loss(Identity(), tensors, 1.0)) == pytest.approx(float(expected), rel=1e-6)


def test_recorrupted_pair_has_independent_noise():
    # Pang et al. 2021: with z ~ N(0, sigma^2), y + a z and y - z / a carry added noise of variance a^2 sigma^2 and
    # sigma^2 / a^2, and for y = x + n with n ~ N(0, sigma^2) their total noises are uncorrelated.
    sigma, alpha = 0.1, 0.5
    rng = np.random.default_rng(9)
    clean = np.full((64, 1, 32, 32), 0.5, dtype=np.float32)
    noisy = clean + sigma * rng.standard_normal(clean.shape, dtype=np.float32)
    config = defaults()
    config["recorrupted"]["alpha"] = alpha
    batch = Recorrupted(config, sigma=np.array([sigma])).prepare({"noisy": noisy}, rng)
    added_in, added_out = batch["input"] - noisy, batch["target"] - noisy
    assert added_in.std() == pytest.approx(alpha * sigma, rel=0.02)
    assert added_out.std() == pytest.approx(sigma / alpha, rel=0.02)
    total_in, total_out = (batch["input"] - clean).ravel(), (batch["target"] - clean).ravel()
    assert abs(np.corrcoef(total_in, total_out)[0, 1]) < 0.01


def test_neighbor2neighbor_validation_ranks_a_denoiser_above_the_identity():
    # The full loss at gamma = 2 scores the identity (regulariser 0, reconstruction 2 sigma^2) below a perfect
    # denoiser (sigma^2 + gamma sigma^2); the reconstruction term alone ranks them the right way round.
    sigma = 0.1
    noisy = 0.5 + sigma * np.random.default_rng(10).standard_normal((16, 1, 32, 32)).astype(np.float32)
    config = defaults()
    config["neighbor2neighbor"]["gamma"] = 2.0
    scheme = Neighbor2Neighbor(config)
    tensors = {k: torch.from_numpy(v) for k, v in scheme.prepare({"noisy": noisy}, np.random.default_rng(11)).items()}

    class Perfect(torch.nn.Module):
        takes_noise_map = False

        def forward(self, image):
            return torch.full_like(image, 0.5)

    assert float(scheme.loss(Identity(), tensors, 1.0)) < float(scheme.loss(Perfect(), tensors, 1.0))
    assert float(scheme.validation_loss(Perfect(), tensors)) == pytest.approx(sigma ** 2, rel=0.1)
    assert float(scheme.validation_loss(Identity(), tensors)) == pytest.approx(2 * sigma ** 2, rel=0.1)


class LevelRecorder(torch.nn.Module):
    """A noise-map model that records the level map of each call and returns its input."""

    takes_noise_map = True

    def __init__(self):
        super().__init__()
        self.levels: list[torch.Tensor] = []

    def forward(self, image, level):
        self.levels.append(level)
        return image


def test_supervised_feeds_the_level_of_its_noisy_input_never_of_the_clean_target():
    """For signal-dependent noise the level map is a function of the signal: computed on the clean patch it would
    hand the network its target. The map is the noise model's level at the noisy input clipped to the range, the
    runtime's map (``noise_sigma="model"``); for Poisson-Gaussian noise, standard deviation sqrt(gain * x +
    read^2) (Foi et al., IEEE TIP 2008)."""
    gain, read = 0.004, 0.01
    noise = noise_from_dict({"kind": "poisson-gaussian", "gain": gain, "read": read})
    scheme = Supervised(defaults(), noise, None, level_maps=True)
    rng = np.random.default_rng(0)
    clean = rng.random((2, 1, 16, 16), dtype=np.float32)
    batch = scheme.prepare({"clean": clean}, rng)
    expected = np.sqrt(gain * np.clip(batch["noisy"], 0.0, 1.0) + read ** 2)
    np.testing.assert_allclose(batch["level"], expected, rtol=1e-6)
    other_target = dict(batch, clean=np.zeros_like(clean))
    np.testing.assert_array_equal(scheme.noise_level(other_target), batch["level"])


@pytest.mark.parametrize("scheme_class", [Supervised, Noise2Noise, Masked, Neighbor2Neighbor, Recorrupted,
                                          SCHEMES["sure"]])
def test_each_scheme_feeds_the_noise_level_of_the_image_the_network_sees(scheme_class):
    """The level map is the standard deviation of the noise in the network's input: sigma for the noisy image, its
    sub-sampled halves (Neighbor2Neighbor picks pixels, it does not average them: Huang et al. 2021), the other shot
    (Noise2Noise) and the masked image; sigma * sqrt(1 + alpha^2) for Recorrupted-to-Recorrupted's input
    y + alpha z (Pang et al. 2021: the variances of independent Gaussian terms add)."""
    sigma, alpha = 0.1, 0.3
    config = defaults()
    config["recorrupted"]["alpha"] = alpha
    noise = noise_from_dict({"kind": "gaussian", "sigma": sigma})
    scheme = scheme_class(config, noise, np.array([sigma], dtype=np.float32), level_maps=True)
    rng = np.random.default_rng(0)
    patch = rng.random((2, 1, 16, 16), dtype=np.float32)
    patches = {"clean": patch} if scheme_class is Supervised else {"noisy": patch, "noisy_b": patch[::-1].copy()}
    batch = {key: torch.from_numpy(np.ascontiguousarray(value)) for key, value in scheme.prepare(patches, rng).items()}
    model = LevelRecorder()
    scheme.loss(model, batch, 0.5)
    expected = sigma * np.sqrt(1 + alpha ** 2) if scheme_class is Recorrupted else sigma
    assert model.levels
    for level in model.levels:
        assert level.shape[0] == 2 and level.shape[1] == 1
        assert torch.allclose(level, torch.full_like(level, expected), rtol=1e-6)
