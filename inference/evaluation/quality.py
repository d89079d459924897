"""Image quality beyond PSNR and SSIM: MS-SSIM with a reference, and figures that need no clean image.

With a clean reference, :func:`ms_ssim` is the multi-scale structural similarity of Wang, Simoncelli and Bovik
(2003). Without one, :func:`no_reference_figures` looks at what a denoiser took away (the residual, noisy minus
output): removed noise should be white, uncorrelated with the output, and little noise should remain.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from grainwright.inference.noise.estimation import estimate_sigma

# Wang, Simoncelli and Bovik, "Multi-scale structural similarity for image quality assessment", Asilomar 2003:
# five scales, exponents fitted in their experiment; SSIM's 11x11 Gaussian window (standard deviation 1.5),
# K1 = 0.01, K2 = 0.03 at every scale; between scales a 2x2 average then keeping every other pixel.
MS_SSIM_WEIGHTS = (0.0448, 0.2856, 0.3001, 0.2363, 0.1333)
WINDOW = 11
WINDOW_SIGMA = 1.5
K1 = 0.01
K2 = 0.03

# Lags (dy, dx) at which the residual's autocorrelation is measured: the immediate and next neighbours.
RESIDUAL_LAGS = ((0, 1), (1, 0), (1, 1), (1, -1), (0, 2), (2, 0))


def _as_hwc(image: np.ndarray) -> np.ndarray:
    image = np.asarray(image, dtype=np.float64)
    return image[:, :, None] if image.ndim == 2 else image


def _window_filter(plane: np.ndarray) -> np.ndarray:
    """Gaussian-weighted local mean, kept only where the whole 11x11 window fits ('valid')."""
    radius = WINDOW // 2
    offsets = np.arange(-radius, radius + 1)
    kernel = np.exp(-(offsets**2) / (2.0 * WINDOW_SIGMA**2))
    kernel /= kernel.sum()
    filtered = ndimage.correlate1d(plane, kernel, axis=0, mode="constant")
    filtered = ndimage.correlate1d(filtered, kernel, axis=1, mode="constant")
    return filtered[radius:-radius, radius:-radius]


def _ssim_and_contrast_structure(x: np.ndarray, y: np.ndarray, data_range: float) -> tuple[float, float]:
    """Mean SSIM and mean contrast-structure term over the valid window positions of one plane."""
    c1 = (K1 * data_range) ** 2
    c2 = (K2 * data_range) ** 2
    mean_x, mean_y = _window_filter(x), _window_filter(y)
    var_x = _window_filter(x * x) - mean_x**2
    var_y = _window_filter(y * y) - mean_y**2
    cov = _window_filter(x * y) - mean_x * mean_y
    contrast_structure = (2 * cov + c2) / (var_x + var_y + c2)
    luminance = (2 * mean_x * mean_y + c1) / (mean_x**2 + mean_y**2 + c1)
    return float(np.mean(luminance * contrast_structure)), float(np.mean(contrast_structure))


def _halve(plane: np.ndarray) -> np.ndarray:
    """2x2 average then every other pixel, the first pixel's block first; an odd edge repeats its last row."""
    if plane.shape[0] % 2:
        plane = np.concatenate([plane, plane[-1:]], axis=0)
    if plane.shape[1] % 2:
        plane = np.concatenate([plane, plane[:, -1:]], axis=1)
    return 0.25 * (plane[0::2, 0::2] + plane[1::2, 0::2] + plane[0::2, 1::2] + plane[1::2, 1::2])


def ms_ssim_scales(height: int, width: int) -> int:
    """How many of the five scales fit: the coarsest must still hold one whole 11x11 window."""
    scales = 1
    side = min(height, width)
    while scales < len(MS_SSIM_WEIGHTS) and math.ceil(side / 2) >= WINDOW:
        side = math.ceil(side / 2)
        scales += 1
    return scales


def ms_ssim(reference: np.ndarray, test: np.ndarray, data_range: float) -> float:
    """Multi-scale structural similarity (Wang, Simoncelli and Bovik 2003).

    ``MS-SSIM = l_M**w_M * prod_j cs_j**w_j``: the contrast-structure term at each of ``M`` scales and the
    luminance term at the coarsest, with the paper's weights ``(0.0448, 0.2856, 0.3001, 0.2363, 0.1333)``. Each
    scale uses SSIM's 11x11 Gaussian window (standard deviation 1.5) over the positions where it fits, with
    ``K1 = 0.01`` and ``K2 = 0.03``; the next scale is a 2x2 block average keeping every other pixel. Channels are
    averaged at each scale. Images smaller than 161 pixels on a side (the fifth scale would be under 11) use fewer scales, the
    remaining weights rescaled to sum to one; negative contrast-structure terms (anti-correlated images)
    count as zero so the product stays real.

    Parameters
    ----------
    reference, test : ndarray
        ``(H, W)`` or ``(H, W, C)``, same shape, at least 11 pixels on a side.
    data_range : float
        Dynamic range of the values (1.0 in the working range, 255 for 8-bit data).

    Returns
    -------
    float
        1.0 for identical images.
    """
    reference, test = _as_hwc(reference), _as_hwc(test)
    if reference.shape != test.shape:
        raise ValueError(f"MS-SSIM needs images of one shape, got {reference.shape} and {test.shape}")
    if min(reference.shape[:2]) < WINDOW:
        raise ValueError(f"MS-SSIM needs images at least {WINDOW} pixels on a side, got {reference.shape[:2]}")
    scales = ms_ssim_scales(*reference.shape[:2])
    weights = np.asarray(MS_SSIM_WEIGHTS[:scales])
    if scales < len(MS_SSIM_WEIGHTS):
        weights = weights / weights.sum()  # the paper's five weights sum to 1.0001: keep them as published

    channels_x = [reference[:, :, c] for c in range(reference.shape[2])]
    channels_y = [test[:, :, c] for c in range(test.shape[2])]
    index = 1.0
    for scale in range(scales):
        pairs = [_ssim_and_contrast_structure(x, y, data_range) for x, y in zip(channels_x, channels_y)]
        ssim_mean = float(np.mean([s for s, _ in pairs]))
        contrast_structure = float(np.mean([cs for _, cs in pairs]))
        if scale < scales - 1:
            index *= max(contrast_structure, 0.0) ** weights[scale]
            channels_x = [_halve(x) for x in channels_x]
            channels_y = [_halve(y) for y in channels_y]
        else:
            index *= max(ssim_mean, 0.0) ** weights[scale]
    return float(index)


def residual_autocorrelation(residual: np.ndarray, lags: tuple[tuple[int, int], ...] = RESIDUAL_LAGS) -> dict:
    """Normalised autocorrelation of a residual at small lags, per lag and the largest in magnitude.

    Noise independent from pixel to pixel leaves a residual whose autocorrelation is near zero at every lag
    other than zero; structure taken out with the noise (edges, texture) is smooth and correlates with its
    neighbours. Channels are pooled.

    Returns
    -------
    dict
        ``{"lags": {"dy,dx": rho, ...}, "max_abs": float}``.
    """
    residual = _as_hwc(residual)
    residual = residual - residual.mean(axis=(0, 1), keepdims=True)
    energy = float(np.mean(residual**2))
    values = {}
    for dy, dx in lags:
        height, width = residual.shape[:2]
        a = residual[max(dy, 0) : height + min(dy, 0), max(dx, 0) : width + min(dx, 0)]
        b = residual[max(-dy, 0) : height + min(-dy, 0), max(-dx, 0) : width + min(-dx, 0)]
        values[f"{dy},{dx}"] = float(np.mean(a * b)) / energy if energy > 0 else 0.0
    return {"lags": values, "max_abs": max(abs(v) for v in values.values())}


def no_reference_figures(noisy: np.ndarray, output: np.ndarray) -> dict:
    """Figures of a denoiser's result that need no clean image.

    Parameters
    ----------
    noisy, output : ndarray
        ``(H, W)`` or ``(H, W, C)`` in the same units (the working range).

    Returns
    -------
    dict
        - ``residual_autocorrelation``: largest |autocorrelation| of noisy minus output at lags of 1 and 2
          pixels (:func:`residual_autocorrelation`); near 0 when what was removed looks like white noise.
        - ``noise_left``: noise standard deviation still in the output, estimated by the wavelet MAD estimator
          (Donoho and Johnstone 1994), as a fraction of the same estimate on the noisy input; mean over
          channels. 1 for the identity, near 0 for a thorough denoiser (and for one that blurs).
        - ``residual_output_correlation``: Pearson correlation of residual and output; near 0 when the residual
          carries no image content.
    """
    noisy, output = _as_hwc(noisy), _as_hwc(output)
    residual = noisy - output
    sigma_noisy = np.asarray(estimate_sigma(noisy), dtype=np.float64)
    sigma_output = np.asarray(estimate_sigma(output), dtype=np.float64)
    noise_left = float(np.mean(sigma_output / np.maximum(sigma_noisy, 1e-12)))
    centred_residual = residual - residual.mean()
    centred_output = output - output.mean()
    scale = math.sqrt(float(np.sum(centred_residual**2)) * float(np.sum(centred_output**2)))
    correlation = float(np.sum(centred_residual * centred_output)) / scale if scale > 0 else 0.0
    return {
        "residual_autocorrelation": residual_autocorrelation(residual)["max_abs"],
        "noise_left": noise_left,
        "residual_output_correlation": correlation,
    }
