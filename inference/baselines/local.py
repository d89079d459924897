"""Local filters: box mean, median, Gaussian filter and bilateral filter.

The first three are the textbook linear and rank filters (SciPy's ``ndimage`` does the work); the bilateral
filter is Tomasi and Manduchi, "Bilateral filtering for gray and color images", ICCV 1998, via
``skimage.restoration.denoise_bilateral``.

Defaults grow with the noise: the values below are the ones our ground-truth grid search picked most often on
six 128x128 scikit-image sample crops at sigma 5, 10, 25 and 50 (8-bit units); no published source.
"""
from __future__ import annotations

import numpy as np
from scipy import ndimage
from skimage.morphology import disk

from grainwright.inference.baselines.base import (
    Baseline,
    Parameter,
    by_noise_level,
    per_channel,
)


def box_mean(image: np.ndarray, sigma: float, *, radius: int = 1) -> np.ndarray:
    """Box mean: the average over a (2 * radius + 1)-pixel square window, reflected at the border.

    Parameters
    ----------
    image : (H, W, C) float32.
    sigma : noise standard deviation (unused: the box mean has no noise-dependent parameter).
    radius : half-width of the window in pixels.
    """
    size = 2 * int(radius) + 1
    return ndimage.uniform_filter(image, size=(size, size, 1), mode="reflect").astype(np.float32)


def median(image: np.ndarray, sigma: float, *, radius: int = 1) -> np.ndarray:
    """Median over a disk of ``radius`` pixels, per channel, reflected at the border.

    Parameters
    ----------
    image : (H, W, C) float32.
    sigma : noise standard deviation (unused).
    radius : radius of the disk in pixels (1 is the 3x3 cross, 2 a 5x5 disk).
    """
    footprint = disk(int(radius)).astype(bool)
    return per_channel(lambda plane: ndimage.median_filter(plane, footprint=footprint, mode="reflect"), image)


def gaussian(image: np.ndarray, sigma: float, *, width: float = 1.0) -> np.ndarray:
    """Gaussian filter of standard deviation ``width`` pixels per channel (kernel truncated at 4 widths).

    Parameters
    ----------
    image : (H, W, C) float32.
    sigma : noise standard deviation (unused).
    width : standard deviation of the Gaussian kernel in pixels.
    """
    return ndimage.gaussian_filter(image, sigma=(width, width, 0), mode="reflect").astype(np.float32)


def bilateral(image: np.ndarray, sigma: float, *, width: float = 1.5, range_strength: float = 2.0) -> np.ndarray:
    """Bilateral filter (Tomasi and Manduchi 1998).

    Each output pixel is a mean of its neighbours within ``3 * width`` pixels, weighted by a spatial Gaussian
    of standard deviation ``width`` and by a Gaussian of the colour distance (Euclidean over the channels)
    of standard deviation ``range_strength * sigma * sqrt(C)``: the noise in a distance between two noisy
    pixels grows with ``sqrt(C)``. Written here, vectorised over the image and looping over window offsets,
    because ``skimage.restoration.denoise_bilateral`` in scikit-image 0.26 returns a displaced, lopsided
    impulse response (an impulse at (7, 7) peaks at (5, 9)), which no parameter fixes.

    Parameters
    ----------
    image : (H, W, C) float32.
    sigma : noise standard deviation.
    width : standard deviation of the spatial Gaussian in pixels.
    range_strength : standard deviation of the range Gaussian as a multiple of ``sigma * sqrt(C)``.
    """
    height, width_px, channels = image.shape
    radius = max(1, int(np.ceil(3 * width)))
    work = image.astype(np.float32)
    # Reflection needs the pad to be shorter than the image; edge replication covers tiny images.
    mode = "reflect" if radius < min(height, width_px) else "edge"
    padded = np.pad(work, ((radius, radius), (radius, radius), (0, 0)), mode=mode)
    range_scale = -0.5 / (range_strength * sigma) ** 2 / channels
    numerator = np.zeros_like(work)
    denominator = np.zeros((height, width_px, 1), dtype=np.float32)
    for dy in range(-radius, radius + 1):
        for dx in range(-radius, radius + 1):
            if dy * dy + dx * dx > radius * radius:
                continue  # a round window, as the spatial Gaussian is round
            spatial = np.exp(-(dy * dy + dx * dx) / (2.0 * width * width))
            neighbour = padded[radius + dy : radius + dy + height, radius + dx : radius + dx + width_px]
            distance = np.sum((neighbour - work) ** 2, axis=2, keepdims=True)
            weight = spatial * np.exp(range_scale * distance)
            numerator += weight * neighbour
            denominator += weight
    return (numerator / denominator).astype(np.float32)


RADIUS = Parameter("radius", "pixels", "half-width of the window", search=(1, 2, 3, 4), calibration=(1, 2, 3))

BASELINES = (
    Baseline(
        name="mean",
        title="box mean",
        function=box_mean,
        parameters=(RADIUS,),
        defaults=lambda level: {"radius": by_noise_level(level, 1, 1, 2)},
    ),
    Baseline(
        name="median",
        title="median filter",
        function=median,
        parameters=(RADIUS,),
        defaults=lambda level: {"radius": by_noise_level(level, 1, 2, 3)},
    ),
    Baseline(
        name="gaussian",
        title="Gaussian filter",
        function=gaussian,
        parameters=(
            Parameter(
                "width", "pixels", "standard deviation of the kernel",
                search=(0.5, 0.75, 1.0, 1.5, 2.0, 3.0), calibration=(0.5, 1.0, 1.5, 2.0),
            ),
        ),
        defaults=lambda level: {"width": by_noise_level(level, 0.5, 0.75, 1.5)},
    ),
    Baseline(
        name="bilateral",
        title="bilateral filter (Tomasi and Manduchi 1998)",
        function=bilateral,
        parameters=(
            Parameter("width", "pixels", "standard deviation of the spatial Gaussian",
                      search=(1.0, 2.0, 3.0), calibration=(1.0, 2.0)),
            Parameter("range_strength", "x sigma", "standard deviation of the range Gaussian",
                      search=(1.0, 2.0, 3.0, 4.0), calibration=(1.0, 2.0, 3.0)),
        ),
        defaults=lambda level: {"width": by_noise_level(level, 1.0, 1.0, 2.0), "range_strength": 3.0},
    ),
)
