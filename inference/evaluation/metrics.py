"""Full-reference image quality: PSNR with an explicit peak, SSIM with the settings of Wang et al. 2004."""
from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

# Wang, Bovik, Sheikh and Simoncelli, "Image quality assessment: from error visibility to structural
# similarity", IEEE TIP 2004: 11x11 circular-symmetric Gaussian window, standard deviation 1.5, K1, K2 below.
SSIM_WINDOW = 11
SSIM_SIGMA = 1.5
SSIM_K1 = 0.01
SSIM_K2 = 0.03


def psnr(reference: np.ndarray, test: np.ndarray, peak: float) -> float:
    """Peak signal-to-noise ratio in dB: ``10 log10(peak**2 / MSE)``.

    Parameters
    ----------
    reference, test : array
        Same shape, any numeric dtype (compared in float64).
    peak : float
        Largest possible signal in the arrays' units, e.g. ``2**bit_depth - 1`` for the effective bit depth
        (4095 for 12-bit data in a 16-bit container), or 1.0 in the working range.

    Returns
    -------
    float
        ``inf`` for identical arrays.
    """
    reference, test = _pair(reference, test)
    mse = float(np.mean((reference - test) ** 2))
    if mse == 0.0:
        return math.inf
    return 10.0 * math.log10(float(peak) ** 2 / mse)


def ssim(reference: np.ndarray, test: np.ndarray, data_range: float) -> float:
    """Mean structural similarity (Wang et al. 2004), averaged over channels.

    Local statistics use an 11x11 Gaussian window of standard deviation 1.5 (normalised to sum 1), population
    (not sample) covariances, ``C1 = (0.01 L)**2`` and ``C2 = (0.03 L)**2`` with ``L = data_range``; the mean is
    taken over positions where the whole window lies inside the image.

    Parameters
    ----------
    reference, test : array
        ``(H, W)`` or ``(H, W, C)`` with H and W at least 11.
    data_range : float
        Dynamic range of the values (peak minus minimum possible), e.g. 255 or 4095 or 1.0.
    """
    reference, test = _pair(reference, test)
    if reference.ndim == 2:
        reference, test = reference[..., None], test[..., None]
    if reference.ndim != 3 or min(reference.shape[:2]) < SSIM_WINDOW:
        raise ValueError(f"SSIM needs (H, W[, C]) images at least {SSIM_WINDOW} pixels on each side, got {reference.shape}")
    kernel = _gaussian_kernel()
    c1 = (SSIM_K1 * data_range) ** 2
    c2 = (SSIM_K2 * data_range) ** 2
    pad = SSIM_WINDOW // 2
    values = []
    for channel in range(reference.shape[2]):
        x, y = reference[..., channel], test[..., channel]
        mean_x, mean_y = _filter(x, kernel), _filter(y, kernel)
        var_x = _filter(x * x, kernel) - mean_x**2
        var_y = _filter(y * y, kernel) - mean_y**2
        cov = _filter(x * y, kernel) - mean_x * mean_y
        numerator = (2 * mean_x * mean_y + c1) * (2 * cov + c2)
        denominator = (mean_x**2 + mean_y**2 + c1) * (var_x + var_y + c2)
        index = numerator / denominator
        values.append(index[pad:-pad, pad:-pad].mean())
    return float(np.mean(values))


def _pair(reference: np.ndarray, test: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    reference = np.asarray(reference, dtype=np.float64)
    test = np.asarray(test, dtype=np.float64)
    if reference.shape != test.shape:
        raise ValueError(f"images differ in shape: {reference.shape} vs {test.shape}")
    return reference, test


def _gaussian_kernel() -> np.ndarray:
    offsets = np.arange(SSIM_WINDOW) - SSIM_WINDOW // 2
    kernel = np.exp(-(offsets**2) / (2.0 * SSIM_SIGMA**2))
    return kernel / kernel.sum()


def _filter(image: np.ndarray, kernel: np.ndarray) -> np.ndarray:
    out = ndimage.correlate1d(image, kernel, axis=0, mode="reflect")
    return ndimage.correlate1d(out, kernel, axis=1, mode="reflect")
