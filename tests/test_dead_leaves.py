"""The dead-leaves generator and the sample photographs of the starting model's training data."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from grainwright.inference.synthetic.dead_leaves import (
    DeadLeavesSettings,
    dead_leaves_image,
    dead_leaves_stream,
    draw_radii,
    radius_cdf,
)
from grainwright.inference.synthetic.sample_images import EXCLUDED, TRAINING, VALIDATION, sample_photo

SMALL = DeadLeavesSettings(size=128, radius_min=1.0, radius_max=64.0)


def test_same_seed_same_image_other_seed_other_image():
    first = dead_leaves_image(np.random.default_rng(3), SMALL)
    again = dead_leaves_image(np.random.default_rng(3), SMALL)
    other = dead_leaves_image(np.random.default_rng(4), SMALL)
    np.testing.assert_array_equal(first, again)
    assert not np.array_equal(first, other)
    assert first.shape == (128, 128) and first.dtype == np.float32
    assert first.min() >= 0.0 and first.max() <= 1.0


def test_stream_is_endless_and_seeded():
    stream, again = dead_leaves_stream(5, SMALL), dead_leaves_stream(5, SMALL)
    images = [next(stream) for _ in range(3)]
    np.testing.assert_array_equal(images[2], [next(again) for _ in range(3)][2])
    assert not np.array_equal(images[0], images[1])


def test_radii_follow_the_inverse_cube_law():
    # Kolmogorov-Smirnov test (scipy.stats.kstest) of the drawn radii against the analytic CDF of the density
    # p(r) ~ r**-3 on [r_min, r_max] (Lee, Mumford and Huang, IJCV 2001).
    radii = draw_radii(np.random.default_rng(0), 20000, 1.0, 100.0)
    assert radii.min() >= 1.0 and radii.max() <= 100.0
    assert stats.kstest(radii, lambda r: radius_cdf(r, 1.0, 100.0)).pvalue > 0.01
    # Negative control: a r**-2 law (uniform in 1/r) is told apart.
    wrong = 1.0 / np.random.default_rng(1).uniform(1.0 / 100.0, 1.0, 20000)
    assert stats.kstest(wrong, lambda r: radius_cdf(r, 1.0, 100.0)).pvalue < 1e-6


def _radial_power(image: np.ndarray) -> np.ndarray:
    """Power spectrum of the Hann-windowed, mean-removed image, averaged over annuli of integer radius."""
    n = image.shape[0]
    window = np.outer(np.hanning(n), np.hanning(n))
    power = np.abs(np.fft.fftshift(np.fft.fft2((image - image.mean()) * window))) ** 2
    yy, xx = np.indices(power.shape) - n // 2
    ring = np.hypot(yy, xx).astype(int).ravel()
    return (np.bincount(ring, power.ravel()) / np.bincount(ring))[: n // 2]


def _slope(images: list[np.ndarray], low: float, high: float) -> float:
    """Log-log slope of the mean radial power spectrum between frequencies ``low`` and ``high`` (cycles/pixel)."""
    n = images[0].shape[0]
    power = np.mean([_radial_power(image) for image in images], axis=0)
    frequency = np.arange(len(power)) / n
    chosen = (frequency >= low) & (frequency <= high)
    return float(np.polyfit(np.log(frequency[chosen]), np.log(power[chosen]), 1)[0])


# Natural images have power spectra falling as 1/f**2 (van der Schaaf and van Hateren, "Modelling the power
# spectra of natural images: statistics and information", Vision Research 36, 1996: exponent 1.88 +- 0.43 over
# their images). The tolerance admits scikit-image's sample photographs (their mean spectrum measured -2.66 in
# this band) and rejects white noise (0).
SLOPE_TOLERANCE = 0.75


def test_power_spectrum_falls_like_natural_images():
    settings = DeadLeavesSettings(size=256, radius_min=1.0, radius_max=128.0)
    rng = np.random.default_rng(11)
    images = [dead_leaves_image(rng, settings) for _ in range(8)]
    # Fitted between the frequencies of the largest and the smallest shapes.
    low, high = 1.0 / settings.radius_max, 1.0 / (2.0 * settings.radius_min)
    assert abs(_slope(images, low, high) + 2.0) < SLOPE_TOLERANCE

    # The tolerance checked on open photographs (scikit-image's sample images, 256-pixel centre crops) ...
    crops = []
    for name in TRAINING[:8]:
        photo = sample_photo(name)
        top, left = (photo.shape[0] - 256) // 2, (photo.shape[1] - 256) // 2
        if top >= 0 and left >= 0:
            crops.append(photo[top:top + 256, left:left + 256])
    assert len(crops) >= 5
    assert abs(_slope(crops, low, high) + 2.0) < SLOPE_TOLERANCE
    # ... and white noise, whose flat spectrum must fail it (negative control).
    noise = [np.random.default_rng(seed).random((256, 256)) for seed in range(8)]
    assert abs(_slope(noise, low, high) + 2.0) > SLOPE_TOLERANCE


def test_settings_are_checked():
    with pytest.raises(ValueError, match="radius_min"):
        DeadLeavesSettings(radius_min=5.0, radius_max=2.0)
    with pytest.raises(ValueError, match="shapes"):
        DeadLeavesSettings(shapes=("triangle",))
    with pytest.raises(ValueError, match="grating_period_min"):
        DeadLeavesSettings(grating_period_min=2.0)
    with pytest.raises(ValueError, match="texture_grains"):
        DeadLeavesSettings(texture_grains=())


def test_gratings_are_periodic_at_the_drawn_periods_and_off_by_default():
    # The gratings are drawn after everything else, so an image with them minus the same seed's image without
    # them (grating_fraction = 0) is the grating field alone; its spectrum (numpy.fft) must peak at a spatial
    # frequency inside the drawn period range. Large shapes, no blur: a few gratings, each over a wide region.
    flat = dict(size=64, radius_min=60.0, radius_max=61.0, blur_probability=0.0)
    for seed in range(6):
        image = dead_leaves_image(np.random.default_rng(seed), DeadLeavesSettings(
            **flat, grating_fraction=1.0, grating_max=0.1, grating_period_min=4.0, grating_period_max=8.0))
        grating = image - dead_leaves_image(np.random.default_rng(seed), DeadLeavesSettings(**flat))
        assert np.ptp(grating) > 0.01
        spectrum = np.abs(np.fft.fft2(grating - grating.mean()))
        fy, fx = np.unravel_index(np.argmax(spectrum), spectrum.shape)
        period = 1.0 / np.hypot(np.fft.fftfreq(64)[fy], np.fft.fftfreq(64)[fx])
        # The FFT grid quantises the frequency to 1/64 cycle per pixel: one bin either side of [4, 8].
        assert 1 / (1 / 4 + 1 / 64) <= period <= 1 / (1 / 8 - 1 / 64), (seed, period)


def test_settings_without_gratings_draw_the_stream_the_shipped_stages_trained_on():
    # Adding the grating settings must not change the images of the two stages trained before they existed:
    # with the defaults (no gratings, the three original grains) an image depends only on its seed, as it did.
    # Summary statistics of seed [16, 3] at the default settings, taken before the gratings were added.
    image = dead_leaves_image(np.random.default_rng([16, 3]), DeadLeavesSettings())
    assert float(image.mean()) == pytest.approx(0.48325568, abs=1e-7)
    assert float(image.std()) == pytest.approx(0.20306848, abs=1e-7)


def test_held_out_images_never_train():
    # The images `grainwright bench train` scores on stay out of the starting model's data.
    from grainwright.benchmarks.training import TEST_IMAGES

    assert set(TEST_IMAGES) <= set(EXCLUDED)
    assert not set(EXCLUDED) & (set(TRAINING) | set(VALIDATION))
    assert not set(TRAINING) & set(VALIDATION)
    with pytest.raises(ValueError, match="held out"):
        sample_photo("camera")
