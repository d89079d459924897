"""Noise estimation checked on scikit-image sample images with known noise added."""
from __future__ import annotations

import numpy as np
import pytest
from skimage import color, data, restoration

from grainwright.inference.noise.estimation import estimate_sigma

RNG = np.random.default_rng(2024)


def _gray_astronaut() -> np.ndarray:
    return np.round(color.rgb2gray(data.astronaut()) * 255)


SAMPLES = {
    "astronaut": _gray_astronaut,
    "camera": lambda: data.camera().astype(np.float64),
    "moon": lambda: data.moon().astype(np.float64),
    "brick": lambda: data.brick().astype(np.float64),
    "coins": lambda: data.coins().astype(np.float64),
}


@pytest.mark.parametrize("name", sorted(SAMPLES))
@pytest.mark.parametrize("sigma", [5.0, 10.0, 25.0])
def test_mad_sigma_within_ten_percent_on_sample_images(name, sigma):
    # Open data: scikit-image sample images; method: Donoho and Johnstone 1994 wavelet MAD.
    clean = SAMPLES[name]()[:256, :256]
    noisy = np.clip(np.round(clean + RNG.normal(0, sigma, clean.shape)), 0, 255)
    estimate = estimate_sigma(noisy)
    assert estimate.shape == (1,)
    assert estimate[0] == pytest.approx(sigma, rel=0.10)


def test_agrees_with_skimage_estimate_sigma_where_that_is_unbiased():
    # Implementation cross-check: skimage.restoration.estimate_sigma is the plain MAD estimator (db2 HH).
    # On a smooth unclipped image both must agree closely.
    clean = data.moon()[:256, :256].astype(np.float64)
    noisy = clean + RNG.normal(0, 8.0, clean.shape)
    ours = estimate_sigma(noisy, flat_only=False, exclude_extremes=False)[0]
    assert ours == pytest.approx(restoration.estimate_sigma(noisy), rel=1e-9)
    assert estimate_sigma(noisy)[0] == pytest.approx(restoration.estimate_sigma(noisy), rel=0.05)


def test_per_channel_and_units_follow_the_input():
    clean = data.astronaut()[:192, :192].astype(np.float64)
    sigmas = np.array([4.0, 8.0, 16.0])
    noisy = clean + RNG.normal(0, 1, clean.shape) * sigmas
    np.testing.assert_allclose(estimate_sigma(noisy), sigmas, rtol=0.10)
    np.testing.assert_allclose(estimate_sigma(noisy / 255.0), sigmas / 255.0, rtol=0.10)


# ------------------------------------------------------------------------------- Poisson-Gaussian fit
from scipy import ndimage  # noqa: E402

from grainwright.inference.noise.estimation import (  # noqa: E402
    analyse_noise,
    correct_fixed_pattern,
    detect_banding,
    detect_correlation,
    detect_impulses,
    fit_poisson_gaussian,
)
from grainwright.inference.noise.models import noise_from_dict  # noqa: E402


def _unit(name: str) -> np.ndarray:
    return (_gray_astronaut() if name == "astronaut" else data.camera().astype(np.float64)) / 255.0


@pytest.mark.parametrize("name", ["astronaut", "camera"])
@pytest.mark.parametrize("gain,read", [(0.01, 0.02), (0.002, 0.005), (0.0005, 0.01), (0.005, 0.03)])
def test_poisson_gaussian_fit_recovers_gain_and_read(name, gain, read):
    # Method after Foi et al. 2008; open data: scikit-image sample images scaled to [0, 1] (raw-like data,
    # unclipped). Acceptance from the project issue: gain within 15%, read within 15% or 0.002 of the range.
    clean = _unit(name)[..., None]
    model = noise_from_dict({"kind": "poisson-gaussian", "gain": gain, "read": read})
    fit = fit_poisson_gaussian(model.sample(clean, np.random.default_rng(17)))
    assert fit.gain == pytest.approx(gain, rel=0.15)
    assert abs(fit.read - read) <= max(0.15 * read, 0.002)
    assert fit.signal_dependent


def test_poisson_gaussian_fit_on_12_bit_integers_with_a_black_level():
    # A 12-bit sensor: 2 native units per event, read noise 6, black level 64, rounded to integers.
    # The fit measures the signal from 0, so the intercept is read**2 - gain * black_level.
    rng = np.random.default_rng(5)
    clean = _gray_astronaut() / 255.0 * 3900
    noisy = np.round(2.0 * rng.poisson(clean / 2.0) + 64 + 6.0 * rng.standard_normal(clean.shape))
    fit = fit_poisson_gaussian(np.clip(noisy, 0, 4095).astype(np.uint16))
    assert fit.gain == pytest.approx(2.0, rel=0.15)
    assert fit.intercept == pytest.approx(36.0 - 2.0 * 64, abs=0.15 * 128)
    assert fit.confident


def test_gaussian_noise_is_not_called_signal_dependent():
    noisy = _gray_astronaut()[..., None] + RNG.normal(0, 10, (512, 512, 1))
    fit = fit_poisson_gaussian(noisy)
    assert not fit.signal_dependent
    assert fit.read == pytest.approx(10.0, rel=0.1)


def _textured_set(spec: dict, names: tuple[str, ...], seed: int, stream: list[int] | None = None) -> list[np.ndarray]:
    """Centre crops (at most 512 pixels) of scikit-image sample images in [0, 1], float32, with ``spec``'s noise
    added from the random stream ``stream`` (default ``[seed, 31]``)."""
    from skimage.util import img_as_float

    model = noise_from_dict(spec)
    rng = np.random.default_rng(stream or [seed, 31])
    images = []
    for name in names:
        image = getattr(data, name)()
        image = color.rgb2gray(image[..., :3]) if image.ndim == 3 else img_as_float(image)
        top, left = max(0, (image.shape[0] - 512) // 2), max(0, (image.shape[1] - 512) // 2)
        images.append(model.sample(image[top:top + 512, left:left + 512, None].astype(np.float32), rng))
    return images


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_one_line_for_a_set_of_textured_images(seed):
    # Model after Foi et al. 2008 (variance = gain * signal + read**2); open data: scikit-image's camera, coins
    # and moon, with the noise stream of `bench train`'s Poisson-Gaussian case on its scored images. Fitted image
    # by image, the moon's narrow range and the coins' texture bend their own lines (on seed 0 the median of the
    # three fits gave gain +7.7% and read -26%, failing this test); the line through the levels of all three
    # recovers both parameters (within 1% on these seeds). Tolerances: ours; over other noise streams (seeds
    # 0-7) the pooled fit was within 2% (gain) and 5% (read).
    from grainwright.inference.noise.analysis import analyse_images

    gain, read = 0.01, 0.02
    images = _textured_set({"kind": "poisson-gaussian", "gain": gain, "read": read}, ("camera", "coins", "moon"), seed,
                           stream=[seed, len("poisson-gaussian"), 1])
    _, found = analyse_images(images, 0.0, 1.0)
    assert found.kind == "poisson-gaussian"
    assert found.model.gain == pytest.approx(gain, rel=0.04)
    assert found.model.read == pytest.approx(read, rel=0.07)


@pytest.mark.parametrize("spec,kind", [
    ({"kind": "poisson-gaussian", "gain": 0.002, "read": 0.01}, "poisson-gaussian"),
    ({"kind": "gaussian", "sigma": 0.02}, "gaussian"),
])
def test_a_split_vote_is_decided_by_the_pooled_line(spec, kind):
    # Open data: eleven scikit-image sample images. With shot noise, several of them alone show too narrow a
    # signal range to call the noise signal-dependent (6 of 14 such images voted Gaussian when this was
    # measured); the set's line decides, and still calls additive noise Gaussian.
    from grainwright.inference.noise.analysis import analyse_images

    names = ("brick", "grass", "gravel", "chelsea", "coffee", "rocket", "page", "text", "clock", "cell", "retina")
    analyses, found = analyse_images(_textured_set(spec, names, 0), 0.0, 1.0)
    if kind == "poisson-gaussian":
        assert any(a.kind == "gaussian" for a in analyses)  # the case this rule is for: a split vote
        assert found.model.gain == pytest.approx(spec["gain"], rel=0.05)
    assert found.kind == kind


@pytest.mark.parametrize("looks", [1.0, 4.0, 10.0])
def test_gamma_speckle_alone_raises_no_impulse_flag(looks):
    # Open data: scikit-image sample images; gamma speckle of L looks (unit-mean gamma, Goodman's fully developed
    # speckle averaged over L looks). Its bright grains are no impulses: the spike threshold follows the gamma
    # quantile (scipy.special.gammaincinv) instead of 4.5 standard deviations, which flagged some of these images
    # at each of the three look counts before.
    names = ("camera", "coins", "moon", "brick", "chelsea")
    for name, image in zip(names, _textured_set({"kind": "speckle-gamma", "looks": looks}, names, 0)):
        analysis = analyse_noise(image, 0.0, 1.0)
        assert analysis.kind == "speckle-gamma", name
        assert not analysis.impulse.flagged, (name, analysis.impulse.fraction)


# ------------------------------------------------------------------------------------------------ flags
def _crop() -> np.ndarray:
    return data.camera()[128:384, 128:384].astype(np.float64) / 255.0


def test_impulse_flag():
    clean = _crop()
    noisy = clean + RNG.normal(0, 0.02, clean.shape)
    assert not detect_impulses(noisy).flagged
    spiky = noise_from_dict({"kind": "impulse", "fraction": 0.01}).sample(noisy[..., None], RNG)
    flag = detect_impulses(spiky)
    assert flag.flagged and 0.005 < flag.fraction < 0.012


@pytest.mark.parametrize("name", ["moon", "astronaut"])
def test_banding_flag_and_correction(name):
    # Long straight edges along rows or columns look like banding to a median; smooth sample images do not.
    clean = (data.moon()[:256, :256] if name == "moon" else _gray_astronaut()[100:356, 100:356]) / 255.0
    noisy = clean + RNG.normal(0, 0.02, clean.shape)
    assert not detect_banding(noisy).flagged
    banding = noise_from_dict({"kind": "banding", "row_sigma": 0.01, "column_sigma": 0.01})
    rows, columns = banding.offsets(*clean.shape, np.random.default_rng(8))
    banded = noisy + rows[:, None] + columns[None, :]
    flag = detect_banding(banded)
    assert flag.flagged and flag.row_ratio > 2.5 and flag.column_ratio > 2.5
    corrected = correct_fixed_pattern(banded)
    assert corrected.dtype == np.float32 and corrected.shape == banded.shape
    # Row-to-row and column-to-column offsets are removed; their slowly varying part cannot be told from
    # the scene and stays (for independent offsets about a quarter of their variance).
    left = corrected - noisy
    pattern = rows[:, None] + columns[None, :]
    assert np.var(left - left.mean()) < 0.4 * np.var(pattern)
    assert not detect_banding(corrected).flagged


def test_banding_correction_keeps_lines_of_the_scene_that_run_along_the_rows():
    """A machined face of fine horizontal lines (period 4 px, procedural) over 70% of every row, on scikit-image's ``moon`` (open
    data), with white noise and row offsets. A plain median along each row takes the lines for row banding: it
    removes them from the face and copies their negative across the rest of the row. The structure-robust offsets
    (inverse local power weights) leave the lines and remove the banding."""
    from grainwright.inference.noise.estimation import estimate_fixed_pattern

    clean = data.moon()[:256, :256] / 255.0
    lines = np.zeros_like(clean)
    lines[:, :180] = 0.08 * np.sign(np.sin(2 * np.pi * np.arange(256) / 4 + 0.5))[:, None]
    clean = clean + lines
    noisy = clean + RNG.normal(0, 0.02, clean.shape)
    rows = np.random.default_rng(8).normal(0, 0.01, 256)
    banded = noisy + rows[:, None]
    plain_rows, _ = estimate_fixed_pattern(banded)
    plain = banded - plain_rows[:, 0, None]
    corrected = correct_fixed_pattern(banded)

    def line_amplitude(image):  # projection onto the line pattern over the face
        return float(np.sum((image - clean + lines)[:, :180] * lines[:, :180]) / np.sum(lines[:, :180] ** 2))

    assert line_amplitude(plain) < 0.5  # measured 0.14: most of the lines taken for banding
    assert line_amplitude(corrected) > 0.9  # measured 0.95
    error = corrected - noisy
    assert np.var(error - error.mean()) < 0.5 * np.var(rows)  # measured 0.40: the banding is gone
    plain_error = plain - noisy
    assert np.var(plain_error - plain_error.mean()) > 10 * np.var(rows)  # measured 42: the plain offsets add error


def test_correlation_flag():
    clean = _crop()
    white = RNG.normal(0, 0.03, clean.shape)
    assert not detect_correlation(clean + white).flagged
    # Averaging horizontal neighbours gives lag-1 correlation 0.5 exactly.
    paired = (white + np.roll(white, 1, axis=1)) / np.sqrt(2)
    flag = detect_correlation(clean + paired)
    assert flag.flagged and flag.horizontal == pytest.approx(0.5, abs=0.1) and abs(flag.vertical) < 0.15
    blurred = ndimage.gaussian_filter(RNG.normal(0, 0.08, clean.shape), 0.8)
    assert detect_correlation(clean + blurred).flagged


@pytest.mark.parametrize(
    "noise,kind,transform",
    [
        ({"kind": "gaussian", "sigma": 0.04}, "gaussian", None),
        ({"kind": "poisson-gaussian", "gain": 0.005, "read": 0.01}, "poisson-gaussian", "anscombe"),
        ({"kind": "speckle-gamma", "looks": 8.0}, "speckle-gamma", "log"),
    ],
)
def test_analyse_noise_names_the_model_and_transform(noise, kind, transform):
    clean = _gray_astronaut()[..., None] / 255.0
    noisy = noise_from_dict(noise).sample(clean, np.random.default_rng(12)) * 4095
    analysis = analyse_noise(noisy, low=0, high=4095)
    assert analysis.kind == kind and analysis.transform == transform
    model = analysis.model.to_dict()
    for key, value in noise.items():
        if key != "kind":
            assert model[key] == pytest.approx(value, rel=0.15, abs=0.002)
    assert analysis.to_dict()["model"]["kind"] == kind


def test_speckle_over_a_narrow_signal_span_is_still_called_speckle():
    """Gamma speckle (4 looks) on a scene whose flat regions span less than a factor of 2 of signal: variance grows
    as the square of the signal (exponent 2); Poisson-Gaussian noise on the same scene as its first power.
    Open data: scikit-image's camera, squeezed into [0.3, 0.5] of the range."""
    rng = np.random.default_rng(5)
    clean = 0.3 + 0.2 * SAMPLES["camera"]()[:256, :256] / 255.0
    analysis = analyse_noise(clean * rng.gamma(4.0, 1.0 / 4.0, clean.shape), 0.0, 2.0)
    levels = np.asarray(analysis.fit.levels)
    assert levels.max() < 2.0 * levels.min()  # the case the analysis could not judge before
    assert analysis.kind.startswith("speckle-gamma") and analysis.transform == "log"
    assert analysis.variance_exponent == pytest.approx(2.0, abs=0.3)
    shot = analyse_noise(0.01 * rng.poisson(clean / 0.01) + 0.002 * rng.standard_normal(clean.shape), 0.0, 2.0)
    assert shot.kind.startswith("poisson-gaussian") and shot.variance_exponent == pytest.approx(1.0, abs=0.3)
