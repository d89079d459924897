"""Noise estimation from a single image: Gaussian sigma, Poisson-Gaussian fit, flags, fixed-pattern correction."""
from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
import pywt
from scipy import ndimage

# Smallest image side analyse_noise accepts.
MIN_ANALYSED_SIDE = 8
# Smallest ratio of the highest to the lowest signal level over which the variance exponent is fitted.
MIN_EXPONENT_SPAN = 1.4
# Median of |N(0, 1)|: converts a median absolute deviation to a standard deviation.
MAD_TO_SIGMA = 0.6744897501960817
# One-sided Gaussian tail beyond 4.5 sigma, 1 - Phi(4.5): how rarely noise alone may make an impulse-like spike.
GAUSSIAN_SPIKE_TAIL = 3.4e-6


def _as_hwc(image: np.ndarray) -> np.ndarray:
    image = np.asarray(image)
    if image.ndim == 2:
        image = image[:, :, None]
    if image.ndim != 3:
        raise ValueError(f"expected an image shaped (H, W) or (H, W, C), got {image.shape}")
    return image


def _unclipped_mask(plane: np.ndarray) -> np.ndarray:
    """Pixels strictly between the plane's minimum and maximum: saturated pixels carry no noise."""
    low, high = plane.min(), plane.max()
    if low == high:
        return np.ones(plane.shape, dtype=bool)
    return (plane > low) & (plane < high)


def _coefficient_mask(pixel_mask: np.ndarray, shape: tuple[int, int], support: int) -> np.ndarray:
    """Map a pixel mask onto the grid of a one-level 2-D wavelet transform (a coefficient is valid when all
    the pixels under its ``support`` are)."""
    eroded = ndimage.minimum_filter(pixel_mask.astype(np.uint8), size=support, mode="nearest")[::2, ::2]
    out = np.ones(shape, dtype=bool)
    rows, cols = min(shape[0], eroded.shape[0]), min(shape[1], eroded.shape[1])
    out[:rows, :cols] = eroded[:rows, :cols].astype(bool)
    return out


def estimate_sigma(
    image: np.ndarray,
    exclude_extremes: bool = True,
    flat_only: bool = True,
    wavelet: str = "db2",
) -> np.ndarray:
    """Standard deviation of additive white Gaussian noise, per channel, by the wavelet MAD estimator.

    Method: Donoho and Johnstone (1994), ``sigma = median(|HH|) / 0.6745`` over the finest diagonal detail
    coefficients of a Daubechies wavelet transform (db2 by default, like scikit-image's
    ``restoration.estimate_sigma``). Two refinements for real images: coefficients touching saturated pixels
    (at the channel's minimum or maximum value) are left out, because clipping removes noise; and with
    ``flat_only`` the median is taken where the horizontal and vertical details of the same scale show no
    structure (local mean energy over 7x7 coefficients below 1.5 sigma**2, iterated three times), because
    texture leaks into HH. For Gaussian noise HH is independent of the other sub-bands, so the selection does
    not bias the estimate; on strongly textured images (grass, gravel) the estimate is still too high.

    Parameters
    ----------
    image : array
        ``(H, W)`` or ``(H, W, C)``, any numeric dtype.

    Returns
    -------
    numpy.ndarray
        float64 of shape ``(C,)``, in the image's units (native pixel values for native images).
    """
    image = _as_hwc(image)
    sigmas = []
    for channel in range(image.shape[2]):
        plane = image[:, :, channel].astype(np.float64)
        _, (horizontal, vertical, diagonal) = pywt.dwt2(plane, wavelet, mode="symmetric")
        keep = np.ones(diagonal.shape, dtype=bool)
        if exclude_extremes:
            keep = _coefficient_mask(_unclipped_mask(plane), diagonal.shape, pywt.Wavelet(wavelet).dec_len)
            if keep.sum() < 0.05 * keep.size:
                keep[:] = True
        sigma = _mad_sigma(diagonal[keep])
        if flat_only and sigma > 0:
            energy = ndimage.uniform_filter((horizontal**2 + vertical**2) / 2.0, size=7, mode="reflect")
            for _ in range(3):
                flat = keep & (energy < 1.5 * sigma * sigma)
                if flat.sum() < 0.05 * flat.size:
                    break
                sigma = _mad_sigma(diagonal[flat])
        sigmas.append(sigma)
    return np.asarray(sigmas, dtype=np.float64)


def _mad_sigma(coefficients: np.ndarray) -> float:
    return float(np.median(np.abs(coefficients)) / MAD_TO_SIGMA) if coefficients.size else 0.0


# ------------------------------------------------------------------------------------- Poisson-Gaussian fit
@dataclass
class PoissonGaussianFit:
    """Result of ``fit_poisson_gaussian``: noise variance ``gain * signal + read**2`` in the image's units.

    Attributes
    ----------
    gain : float
        Slope of variance against signal (>= 0); units of the image (per event for Poisson data).
    read : float
        Standard deviation of the signal-independent part, ``sqrt(max(intercept, 0))``.
    intercept : float
        Fitted variance at zero signal (may be negative with a black-level offset; then ``read`` is 0).
    gain_error, intercept_error : float
        Standard errors of the slope and intercept from the weighted fit.
    signal_dependent : bool
        The slope is significant (more than 3 standard errors) and the fitted variance grows by more than half
        across the observed signal range.
    confident : bool
        At least six signal levels were usable, spanning a fifth of the value range and reaching into its
        lowest 30% (so the intercept is no long extrapolation), and the fit explains them (reduced chi-square
        below 4).
    levels, variances, counts : list of float / int
        The (mean signal, noise variance, blocks) of each signal level used: the points of the fit.
    """

    gain: float
    read: float
    intercept: float
    gain_error: float
    intercept_error: float
    signal_dependent: bool
    confident: bool
    levels: list[float] = field(default_factory=list)
    variances: list[float] = field(default_factory=list)
    counts: list[int] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def variance_at(self, signal: np.ndarray | float) -> np.ndarray:
        """Fitted noise variance at a signal level (image units squared), floored at a tiny positive value."""
        floor = 1e-6 * max(self.variances) if self.variances else 1e-30
        return np.maximum(self.gain * np.asarray(signal, dtype=np.float64) + self.intercept, max(floor, 1e-30))

    def sigma_at(self, signal: np.ndarray | float) -> np.ndarray:
        """Fitted noise standard deviation at a signal level (image units)."""
        return np.sqrt(self.variance_at(signal))


def _haar_blocks(plane: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """One level of the orthonormal 2-D Haar transform on 2x2 blocks: block mean and the three details.

    Each detail of iid noise of variance ``s**2`` has variance ``s**2``; for signal-dependent noise, the mean
    of the four pixels' variances.
    """
    height, width = plane.shape[0] // 2 * 2, plane.shape[1] // 2 * 2
    p = plane[:height, :width]
    a, b, c, d = p[0::2, 0::2], p[0::2, 1::2], p[1::2, 0::2], p[1::2, 1::2]
    mean = (a + b + c + d) / 4.0
    horizontal = (a + b - c - d) / 2.0
    vertical = (a - b + c - d) / 2.0
    diagonal = (a - b - c + d) / 2.0
    return mean, horizontal, vertical, diagonal


def _clip_levels(plane: np.ndarray) -> tuple[float | None, float | None]:
    """Values the data is clipped at: the minimum / maximum when at least 0.05% of pixels sit exactly there."""
    low, high = float(plane.min()), float(plane.max())
    threshold = max(2, int(0.0005 * plane.size))
    clip_low = low if np.count_nonzero(plane == low) >= threshold else None
    clip_high = high if np.count_nonzero(plane == high) >= threshold else None
    return clip_low, clip_high


def _level_points(
    blocks: list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]],
    levels: int,
    min_blocks: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(mean signal, robust noise variance, block count) per signal level over the selected blocks.

    A level where more than 0.2% of the blocks hold a clipped pixel is left out (for Gaussian noise that is a
    level within about 3.3 standard deviations of the clipping value): clipping has cut part of its noise.
    Elsewhere, blocks next to clipped pixels are left out.
    """
    means, variances, counts = [], [], []
    for signal, diagonal, clipped, near_clipped, selected in blocks:
        candidates = signal[selected]
        if candidates.size < min_blocks:
            continue
        # Equal-count levels, split further where they are wide: within a level the variance must be close
        # to linear in the signal for the robust estimate to stand for the level's mean signal.
        bins = min(levels, candidates.size // min_blocks)
        low, high = float(candidates.min()), float(candidates.max())
        edges = np.unique(
            np.concatenate([np.quantile(candidates, np.linspace(0.0, 1.0, bins + 1)), np.linspace(low, high, levels + 1)])
        )
        for lower, upper in zip(edges[:-1], edges[1:]):
            in_level = selected & (signal >= lower) & (signal <= upper)
            if np.count_nonzero(clipped & in_level) > 0.002 * np.count_nonzero(in_level):
                continue
            chosen = in_level & ~near_clipped
            n = int(np.count_nonzero(chosen))
            if n < min_blocks:
                continue
            means.append(float(signal[chosen].mean()))
            variances.append(_robust_variance(diagonal[chosen]))
            counts.append(n)
    return np.array(means), np.array(variances), np.array(counts)


def _robust_variance(samples: np.ndarray) -> float:
    """Mean square of the samples within 4 MAD-standard deviations of zero: robust to stray edges, and unlike
    the squared MAD itself not quantised by discrete (low-count Poisson) data. Truncating Gaussian data at 4
    sigma lowers its variance by 0.1%."""
    limit = 4.0 * _mad_sigma(samples)
    inside = samples[np.abs(samples) <= limit] if limit > 0 else samples
    return float(np.mean(inside**2))


def fit_poisson_gaussian(image: np.ndarray, levels: int = 24, min_blocks: int = 300) -> PoissonGaussianFit:
    """Fit noise variance ``gain * signal + read**2`` from one image.

    Method after Foi, Trimeche, Katkovnik and Egiazarian, "Practical Poissonian-Gaussian noise modeling and
    fitting for single-image raw-data", IEEE TIP 2008: a wavelet detail gives the local noise, a local mean the
    local signal, only smooth regions are used, points are grouped into signal levels and a straight line is
    fitted to (mean, variance). Our simplifications: orthonormal Haar 2x2 blocks (the diagonal detail is the
    noise sample, the mean of 3x3 blocks the signal); smooth regions are those whose horizontal and vertical
    detail energy (5x5 blocks) is at most 1.25 times the noise variance the current line predicts, refined over
    three rounds (selecting on sub-bands other than the diagonal keeps the selection from biasing the
    variance); a robust per-level variance (mean square within 4 MAD-sigmas); levels with clipped pixels and blocks next to clipped
    pixels dropped instead of modelling the clipping; and an iteratively reweighted least-squares line that drops outlying levels
    (textures). For several channels the points of all channels are pooled.

    Parameters
    ----------
    image : array
        ``(H, W)`` or ``(H, W, C)`` in any units (native values or working range); results are in those units.
    levels : int
        Number of signal levels (equal-count bins of the signal estimate).
    min_blocks : int
        Fewest 2x2 blocks a level needs.
    """
    image = _as_hwc(image)
    planes = []
    for channel in range(image.shape[2]):
        plane = image[:, :, channel].astype(np.float64)
        mean, horizontal, vertical, diagonal = _haar_blocks(plane)
        if mean.size < min_blocks:
            continue
        signal = ndimage.uniform_filter(mean, size=3, mode="reflect")
        clip_low, clip_high = _clip_levels(plane)
        pixels_clipped = np.zeros(plane.shape, dtype=bool)
        if clip_low is not None:
            pixels_clipped |= plane <= clip_low
        if clip_high is not None:
            pixels_clipped |= plane >= clip_high
        clipped = _haar_blocks(pixels_clipped.astype(np.float64))[0] > 0
        near_clipped = ndimage.maximum_filter(clipped, size=3)
        energy = ndimage.uniform_filter((horizontal**2 + vertical**2) / 2.0, size=5, mode="reflect")
        planes.append((signal, diagonal, clipped, near_clipped, energy))
    # First round: the flattest half of the blocks; later rounds: those the current line calls flat.
    selection = [(s, d, c, n, e <= np.median(e)) for s, d, c, n, e in planes]
    fit = _fit_line(*_level_points(selection, levels, min_blocks), value_range=_value_range(image))
    for _ in range(3):
        selection = [(s, d, c, n, e <= 1.25 * fit.variance_at(s)) for s, d, c, n, e in planes]
        points = _level_points(selection, levels, min_blocks)
        if points[0].size < 2:
            break
        fit = _fit_line(*points, value_range=_value_range(image))
    return fit


def pool_poisson_gaussian(fits: list[PoissonGaussianFit], ranges: list[tuple[float, float]]) -> PoissonGaussianFit:
    """One noise line for several images of one sensor, fitted to the signal levels of all of them at once.

    Each image's fit (``fit_poisson_gaussian``) contributes its (mean signal, noise variance, blocks) points,
    brought to working units (``x = (value - low) / (high - low)``, variance over ``(high - low)**2``); one
    weighted line is fitted to them all, as for one image (Foi et al., IEEE TIP 2008, fit the line to the
    points of one image; one sensor's images share the line, so their points pool). A textured image whose
    few flat levels bend its own line then weighs by its points, instead of deciding the gain or the read
    noise alone as a median of separate fits can.

    Parameters
    ----------
    fits : list of PoissonGaussianFit
        Per-image fits, each in its image's native units.
    ranges : list of (float, float)
        The native ``(low, high)`` that map to working 0 and 1, one per fit.

    Returns
    -------
    PoissonGaussianFit
        In working units: ``variance = gain * x + read**2`` for ``x`` in [0, 1].
    """
    means, variances, counts = [], [], []
    for fit, (low, high) in zip(fits, ranges):
        span = high - low
        means.extend((np.asarray(fit.levels, dtype=np.float64) - low) / span)
        variances.extend(np.asarray(fit.variances, dtype=np.float64) / span**2)
        counts.extend(fit.counts)
    return _fit_line(np.array(means), np.array(variances), np.array(counts, dtype=np.float64), value_range=(0.0, 1.0))


def _value_range(image: np.ndarray) -> tuple[float, float]:
    low, high = float(image.min()), float(image.max())
    return low, (high if high > low else low + 1.0)


def _fit_line(
    means: np.ndarray, variances: np.ndarray, counts: np.ndarray, value_range: tuple[float, float]
) -> PoissonGaussianFit:
    """Weighted least squares of variance on signal, reweighted by the fitted variance, outliers dropped."""
    if means.size < 2:
        overall = float(np.median(variances)) if variances.size else 0.0
        return PoissonGaussianFit(0.0, float(np.sqrt(max(overall, 0.0))), overall, np.inf, np.inf, False, False,
                                  means.tolist(), variances.tolist(), counts.tolist())
    keep = np.ones(means.size, dtype=bool)
    design = np.stack([means, np.ones_like(means)], axis=1)
    predicted = np.maximum(variances, 1e-30)
    for _ in range(6):
        # Variance of a variance estimate from n Gaussian samples: 2 var**2 / n.
        weights = counts / (2.0 * np.maximum(predicted, 1e-30) ** 2)
        w = weights * keep
        normal = design.T @ (design * w[:, None])
        coefficients = np.linalg.lstsq(normal, design.T @ (w * variances), rcond=None)[0]
        fitted = design @ coefficients
        predicted = np.maximum(fitted, np.maximum(1e-6 * np.max(variances), 1e-30))
        standardised = (variances - fitted) * np.sqrt(counts / (2.0 * predicted**2))
        new_keep = np.abs(standardised) <= max(4.0, 2.5 * float(np.median(np.abs(standardised[keep]))))
        if keep.sum() - (~new_keep & keep).sum() < 3 or np.array_equal(new_keep, keep):
            break
        keep = new_keep
    weights = counts / (2.0 * predicted**2) * keep
    covariance = np.linalg.pinv(design.T @ (design * weights[:, None]))
    slope, intercept = (float(v) for v in coefficients)
    slope_error, intercept_error = (float(np.sqrt(max(covariance[i, i], 0.0))) for i in (0, 1))
    used = int(keep.sum())
    chi_square = float(np.sum(weights * (variances - fitted) ** 2)) / max(used - 2, 1)
    low_signal, high_signal = float(means[keep].min()), float(means[keep].max())
    gain = max(slope, 0.0)
    floor = gain * low_signal + intercept
    ceiling = gain * high_signal + intercept
    signal_dependent = slope > 3.0 * slope_error and ceiling > 1.5 * max(floor, 1e-30)
    span = value_range[1] - value_range[0]
    confident = (
        used >= 6
        and (high_signal - low_signal) >= 0.2 * span
        and low_signal - value_range[0] <= 0.3 * span  # the read-noise intercept is not a long extrapolation
        and chi_square < 4.0
    )
    return PoissonGaussianFit(
        gain=gain,
        read=float(np.sqrt(max(intercept, 0.0))),
        intercept=intercept,
        gain_error=slope_error,
        intercept_error=intercept_error,
        signal_dependent=bool(signal_dependent),
        confident=bool(confident),
        levels=means[keep].tolist(),
        variances=variances[keep].tolist(),
        counts=counts[keep].astype(int).tolist(),
    )


# ------------------------------------------------------------------------------------------------- flags
@dataclass
class ImpulseFlag:
    """Isolated spikes: pixels above (or below) all 8 neighbours by more than a threshold (image units;
    ``threshold`` is its smallest value).

    ``fraction`` of such pixels; ``flagged`` when above 0.1% (Gaussian or Poisson-Gaussian noise gives
    fewer than 0.01% at 4.5 sigma).
    """

    fraction: float
    threshold: float
    flagged: bool


def detect_impulses(image: np.ndarray, noise_sigma: np.ndarray | None = None, limit: float = 1e-3) -> ImpulseFlag:
    """Flag impulse (salt-and-pepper or random-valued) noise by counting isolated spikes.

    A pixel is a spike when it exceeds every one of its 8 neighbours, or falls below every one, by more than
    ``max(4.5 sigma, 1% of the value range)``; single-pixel spikes are what a 3x3 median removes (the classic
    detector of adaptive median filters), while edges and textures have neighbours on both sides. ``sigma`` is
    the robust spread of a high-pass residual (``residual_sigma``), which, unlike the wavelet MAD, does not
    under-state correlated noise; for signal-dependent noise pass ``noise_sigma``, a per-pixel standard
    deviation map shaped like the image (e.g. from a Poisson-Gaussian fit), which is used where larger.
    """
    image = _as_hwc(image).astype(np.float64)
    sigma = residual_sigma(image)
    local = None if noise_sigma is None else _as_hwc(np.asarray(noise_sigma, dtype=np.float64))
    spikes = 0
    threshold = 0.0
    footprint = np.ones((3, 3), dtype=bool)
    footprint[1, 1] = False
    for channel in range(image.shape[2]):
        plane = image[:, :, channel]
        span = float(plane.max() - plane.min())
        threshold = max(4.5 * float(sigma[channel]), 0.01 * span)
        if threshold <= 0:
            continue
        if local is not None:
            threshold = np.maximum(threshold, 4.5 * local[:, :, min(channel, local.shape[2] - 1)])
        highest = ndimage.maximum_filter(plane, footprint=footprint, mode="mirror")
        lowest = ndimage.minimum_filter(plane, footprint=footprint, mode="mirror")
        spikes += int(np.count_nonzero((plane - highest > threshold) | (lowest - plane > threshold)))
    fraction = spikes / float(image.size)
    return ImpulseFlag(fraction=fraction, threshold=float(np.min(threshold)), flagged=fraction > limit)


@dataclass
class BandingFlag:
    """Row/column fixed pattern: robust standard deviation of per-row and per-column offsets (image units),
    and each as a ratio to what the noise alone would give (``ratio > 2.5`` raises the flag)."""

    row_strength: float
    column_strength: float
    row_ratio: float
    column_ratio: float
    flagged: bool


def _high_pass(plane: np.ndarray) -> np.ndarray:
    return plane - ndimage.gaussian_filter(plane, sigma=2.0, mode="reflect")


# Share of white noise's standard deviation a high-pass "image minus Gaussian blur (2 px)" keeps:
# sqrt(1 - 2 w0 + sum(w**2)) with w the blur kernel, w0 = 1 / (4 pi 2**2) and sum(w**2) = 1 / (4 pi 2**2).
HIGH_PASS_KEEPS = float(np.sqrt(1.0 - 1.0 / (4.0 * np.pi * 4.0)))
# The same for a 1-D blur of 2 px: w0 = sum(w**2) = 1 / (2 sqrt(pi) 2).
HIGH_PASS_KEEPS_1D = float(np.sqrt(1.0 - 1.0 / (2.0 * np.sqrt(np.pi) * 2.0)))


def residual_sigma(image: np.ndarray) -> np.ndarray:
    """Per-channel noise spread from a high-pass residual (image minus a 2-pixel Gaussian blur): 1.4826 x MAD
    of the residual divided by the share of white noise the high-pass keeps. Counts correlated noise in full
    (the wavelet MAD does not) but also some texture; used to set detection thresholds."""
    image = _as_hwc(image).astype(np.float64)
    return np.array([_robust_std(_high_pass(image[:, :, c])) / HIGH_PASS_KEEPS for c in range(image.shape[2])])


def interframe_noise_correlation(first: np.ndarray, second: np.ndarray) -> float:
    """Correlation of the noise of two frames of a stack at the same pixels, from the wavelet MAD estimator.

    Method: with ``s(x)`` the noise standard deviation of ``estimate_sigma`` (Donoho and Johnstone 1994: MAD of
    the finest diagonal wavelet details, where the image holds no structure), noise of correlation ``rho``
    between the frames gives ``s(a - b)**2 = s(a)**2 + s(b)**2 - 2 rho s(a) s(b)``, so
    ``rho = (s(a)**2 + s(b)**2 - s(a - b)**2) / (2 s(a) s(b))``. Structure that holds still cancels in the
    difference, and the flat-region selection keeps structure that moves (and texture) out of the estimates. A
    pixel pattern repeated in every frame counts as correlated noise; row or column offsets do not (they have
    no diagonal detail: flag them with ``detect_banding``). The noise must not depend on the signal (Gaussian
    as is, Poisson-Gaussian after the Anscombe transform). Frames ``(H, W)`` or ``(H, W, C)`` of the same
    shape, in any units; returns the mean over channels (0 where a frame shows no noise).
    """
    a, b = _as_hwc(first).astype(np.float64), _as_hwc(second).astype(np.float64)
    if a.shape != b.shape:
        raise ValueError(f"frames of different shapes {a.shape} and {b.shape}")
    spread_a, spread_b = estimate_sigma(a), estimate_sigma(b)
    spread_difference = estimate_sigma(a - b, exclude_extremes=False)
    values = [(sa**2 + sb**2 - sd**2) / (2 * sa * sb)
              for sa, sb, sd in zip(spread_a, spread_b, spread_difference) if sa > 0 and sb > 0]
    return float(np.mean(values)) if values else 0.0


# Window (pixels) of the local power of the high-pass residual whose inverse weighs each pixel in the structure-robust
# offsets: about the size of an edge's or a fine texture's footprint after the 2-pixel blur (common practice, no
# source).
STRUCTURE_WINDOW = 7


def _weighted_median(values: np.ndarray, weights: np.ndarray, axis: int) -> np.ndarray:
    """Weighted median along ``axis``: the smallest value whose cumulative weight reaches half the total."""
    values, weights = np.moveaxis(values, axis, -1), np.moveaxis(weights, axis, -1)
    order = np.argsort(values, axis=-1)
    values, weights = np.take_along_axis(values, order, -1), np.take_along_axis(weights, order, -1)
    cumulative = np.cumsum(weights, axis=-1)
    index = np.argmax(cumulative >= 0.5 * cumulative[..., -1:], axis=-1)
    return np.take_along_axis(values, index[..., None], -1)[..., 0]


def estimate_fixed_pattern(image: np.ndarray, iterations: int = 3,
                           robust_to_structure: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Per-row and per-column offsets, shaped ``(H, C)`` and ``(W, C)``, in image units (zero mean).

    Robust offsets of a high-pass residual: the median along each row of the image minus its blur across rows
    (Gaussian, standard deviation 2 pixels, vertical only), then the same for columns with the row offsets
    removed, alternated ``iterations`` times. Slow variations (illumination, and the slowly varying part of
    the pattern itself) stay in the image: for offsets drawn independently per row, about three quarters of
    the pattern's variance is found.

    A plain median mistakes scene structure that runs along a row (fine horizontal lines on a surface, a long
    edge) for an offset of the whole row when it covers much of the row. With ``robust_to_structure`` each pixel
    weighs by the inverse of the local power of its high-pass residual (mean square over ``STRUCTURE_WINDOW``
    pixels), a weighted median: flat, quiet regions set the offsets, while edges, texture and (for
    signal-dependent noise) bright regions hardly count; a row offset is present in every pixel of the row, so
    the quiet ones find it. On the demo's generated frames (row banding 24 DN, fine horizontal machining lines,
    12-bit Poisson-Gaussian noise) the plain offsets cost 2.2 to 3.7 dB of the frame's PSNR and the weighted
    ones gain 0.22 to 0.26 dB, within 0.08 dB of removing the true row offsets.
    """
    image = _as_hwc(image).astype(np.float64)
    height, width, channels = image.shape
    rows = np.zeros((height, channels))
    columns = np.zeros((width, channels))
    for channel in range(channels):
        plane = image[:, :, channel]
        weights = None
        if robust_to_structure:
            residual = _high_pass(plane)
            power = ndimage.uniform_filter(residual * residual, STRUCTURE_WINDOW, mode="reflect")
            weights = 1.0 / np.maximum(power, np.finfo(np.float64).tiny)
        for _ in range(iterations):
            without_columns = plane - columns[None, :, channel]
            across_rows = without_columns - ndimage.gaussian_filter1d(without_columns, 2.0, axis=0, mode="reflect")
            rows[:, channel] = (np.median(across_rows, axis=1) if weights is None
                                else _weighted_median(across_rows, weights, axis=1))
            without_rows = plane - rows[:, channel, None]
            across_columns = without_rows - ndimage.gaussian_filter1d(without_rows, 2.0, axis=1, mode="reflect")
            columns[:, channel] = (np.median(across_columns, axis=0) if weights is None
                                   else _weighted_median(across_columns, weights, axis=0))
        rows[:, channel] -= rows[:, channel].mean()
        columns[:, channel] -= columns[:, channel].mean()
    return rows, columns


def detect_banding(image: np.ndarray, limit: float = 2.5) -> BandingFlag:
    """Flag row or column banding (fixed-pattern noise).

    The spread of the offsets from ``estimate_fixed_pattern`` (1.4826 x MAD, so a few rows crossed by
    horizontal edges do not count) is compared with the spread noise alone gives a median of W (or H)
    residual values: ``1.2533 * s * sqrt((1 + 2 r) / W)``, with ``s`` the robust spread of the residual
    (the 1-D high-pass keeps ``sqrt(1 - 1 / (2 sqrt(pi) 2))`` of white noise), 1.2533 the
    asymptotic standard error factor of a median, and ``(1 + 2 r)`` the variance inflation of an average of
    values with lag-1 correlation ``r`` along the row (from ``detect_correlation``, floored at 0). A ratio above
    ``limit`` (2.5: white noise stays below 2 on the sample images, row offsets of 0.3 noise standard
    deviations on 512-pixel rows reach about 3; common practice, no source) raises the flag.
    """
    image = _as_hwc(image).astype(np.float64)
    rows, columns = estimate_fixed_pattern(image)
    correlation = detect_correlation(image)
    height, width = image.shape[:2]
    spread = max(float(np.mean(residual_sigma(image))) * HIGH_PASS_KEEPS_1D, 1e-12)
    row_strength = float(np.mean([_robust_std(rows[:, c]) for c in range(image.shape[2])]))
    column_strength = float(np.mean([_robust_std(columns[:, c]) for c in range(image.shape[2])]))
    row_noise = 1.2533 * spread * np.sqrt((1.0 + 2.0 * max(correlation.horizontal, 0.0)) / width)
    column_noise = 1.2533 * spread * np.sqrt((1.0 + 2.0 * max(correlation.vertical, 0.0)) / height)
    row_ratio, column_ratio = float(row_strength / row_noise), float(column_strength / column_noise)
    return BandingFlag(row_strength, column_strength, row_ratio, column_ratio, max(row_ratio, column_ratio) > limit)


def _robust_std(values: np.ndarray) -> float:
    return float(1.4826 * np.median(np.abs(values - np.median(values))))


def correct_fixed_pattern(image: np.ndarray, rows: bool = True, columns: bool = True) -> np.ndarray:
    """Remove row and/or column banding estimated from the image itself (``estimate_fixed_pattern`` with
    ``robust_to_structure``, so that lines and edges of the scene are not taken for banding and copied across
    the frame).

    Noise2Noise cannot remove a pattern present in both shots and blind-spot schemes cannot remove correlated
    noise, so this runs before training and inference when ``detect_banding`` raises its flag.

    Returns
    -------
    numpy.ndarray
        float32, same shape as the input (``(H, W)`` stays ``(H, W)``), in the input's units, not clipped.
    """
    array = np.asarray(image)
    hwc = _as_hwc(array).astype(np.float64)
    row_offsets, column_offsets = estimate_fixed_pattern(hwc, robust_to_structure=True)
    if rows:
        hwc = hwc - row_offsets[:, None, :]
    if columns:
        hwc = hwc - column_offsets[None, :, :]
    return hwc.reshape(array.shape).astype(np.float32)


@dataclass
class CorrelationFlag:
    """Correlation of horizontally and vertically neighbouring noise values (-1..1); white noise gives 0.
    ``flagged`` when either exceeds 0.3 (common practice, no source: white noise on the smooth sample images
    reads below 0.15, but image content adds up to 0.25 on textured ones at low noise, while demosaicing,
    sharpening or a 2-pixel blur give 0.5 and more). Strongly textured images (grass) read as correlated."""

    horizontal: float
    vertical: float
    flagged: bool


def detect_correlation(image: np.ndarray, limit: float = 0.3) -> CorrelationFlag:
    """Estimate the lag-1 correlation of the noise in flat regions.

    For noise of variance ``s**2`` with correlations ``r1, r2, r4`` at lags 1, 2, 4, the second differences
    ``e1 = x[i+1] - (x[i] + x[i+2]) / 2`` and ``e2 = x[i+2] - (x[i] + x[i+4]) / 2`` have variances
    ``s**2 (1.5 + 0.5 r2 - 2 r1)`` and ``s**2 (1.5 + 0.5 r4 - 2 r2)``; with ``r2, r4`` small,
    ``r1 = 0.75 (1 - var(e1) / var(e2))``. Second differences cancel linear image content; variances are
    squared MADs over the flattest half of the image (2x2 blocks whose local horizontal and vertical detail
    energy is below the median). Correlation reaching beyond two pixels (strong blur) is underestimated but
    still shows.
    """
    image = _as_hwc(image).astype(np.float64)
    estimates = {"horizontal": [], "vertical": []}
    for channel in range(image.shape[2]):
        plane = image[:, :, channel]
        _, horizontal, vertical, _ = _haar_blocks(plane)
        energy = ndimage.uniform_filter((horizontal**2 + vertical**2) / 2.0, size=5, mode="reflect")
        flat_blocks = energy <= np.median(energy)
        flat = np.zeros(plane.shape, dtype=bool)
        flat[: flat_blocks.shape[0] * 2, : flat_blocks.shape[1] * 2] = np.repeat(np.repeat(flat_blocks, 2, 0), 2, 1)
        for name, axis in (("horizontal", 1), ("vertical", 0)):
            x = np.moveaxis(plane, axis, 1)
            mask = np.moveaxis(flat, axis, 1)
            if x.shape[1] < 5:
                estimates[name].append(0.0)
                continue
            keep = mask[:, :-4] & mask[:, 2:-2] & mask[:, 4:]
            one = (x[:, 1:-3] - (x[:, :-4] + x[:, 2:-2]) / 2.0)[keep]
            two = (x[:, 2:-2] - (x[:, :-4] + x[:, 4:]) / 2.0)[keep]
            spread_two = _mad_sigma(two)
            estimates[name].append(0.75 * (1.0 - (_mad_sigma(one) / spread_two) ** 2) if spread_two > 0 else 0.0)
    horizontal_rho = float(np.mean(estimates["horizontal"]))
    vertical_rho = float(np.mean(estimates["vertical"]))
    return CorrelationFlag(horizontal_rho, vertical_rho, bool(max(horizontal_rho, vertical_rho) > limit))


# ---------------------------------------------------------------------------------------------- analysis
@dataclass
class NoiseAnalysis:
    """Everything ``analyse_noise`` finds about one image's noise.

    Native units are the image's pixel values; working units are fractions of the full range
    ``high - low`` of the normalisation (see ``grainwright.inference.images.normalization``).

    Attributes
    ----------
    low, high : float
        Native values of the full range's ends.
    sigma : list of float
        Wavelet-MAD noise standard deviation per channel, native units.
    sigma_percent : list of float
        The same as a percentage of the full range.
    fit : PoissonGaussianFit
        Variance against signal, native units (signal measured from 0, not from ``low``).
    variance_exponent : float or None
        Slope of log(variance) against log(signal above ``low``): about 0 for additive, 1 for Poisson-like
        and 2 for multiplicative (speckle) noise; None when the signal levels span less than a factor of
        ``MIN_EXPONENT_SPAN`` (1.4).
    impulse, banding, correlation : flags
    kind : str
        The noise model suggested: ``"gaussian"``, ``"poisson-gaussian"`` or ``"speckle-gamma"`` (with
        ``"+impulse"`` when impulses are flagged).
    model : NoiseModel
        That model with parameters in working units, ready for ``save_noise``.
    confident : bool
        Whether the model is trustworthy enough to train on (e.g. Recorrupted-to-Recorrupted needs it).
    transform : str or None
        Variance-stabilising transform to train in: ``"anscombe"``, ``"log"`` or None.
    notes : list of str
        Plain-language reasons and cautions.
    """

    low: float
    high: float
    sigma: list[float]
    sigma_percent: list[float]
    fit: PoissonGaussianFit
    variance_exponent: float | None
    impulse: ImpulseFlag
    banding: BandingFlag
    correlation: CorrelationFlag
    kind: str
    model: Any
    confident: bool
    transform: str | None
    notes: list[str] = field(default_factory=list)

    @property
    def signal_dependent(self) -> bool:
        return self.fit.signal_dependent

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-serialisable dict (the model as its noise description)."""
        data = {f: getattr(self, f) for f in ("low", "high", "sigma", "sigma_percent", "variance_exponent", "kind",
                                              "confident", "transform", "notes")}
        data["signal_dependent"] = self.signal_dependent
        data["fit"] = self.fit.to_dict()
        data["fit_working"] = self.working_fit()
        data["impulse"] = asdict(self.impulse)
        data["banding"] = asdict(self.banding)
        data["correlation"] = asdict(self.correlation)
        data["model"] = self.model.to_dict()
        return _plain(data)

    def working_fit(self) -> dict[str, float]:
        """The Poisson-Gaussian fit in working units: ``variance = gain * x + read**2`` for ``x`` in [0, 1]."""
        span = self.high - self.low
        intercept = self.fit.gain * self.low + self.fit.intercept  # variance where the native value is `low`
        return {"gain": self.fit.gain / span, "read": float(np.sqrt(max(intercept, 0.0))) / span,
                "intercept": intercept / span**2}


def _plain(value: Any) -> Any:
    """numpy scalars and containers to plain Python, for JSON."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def _variance_exponent(fit: PoissonGaussianFit, low: float) -> float | None:
    levels = np.asarray(fit.levels) - low
    variances = np.asarray(fit.variances)
    keep = (levels > 0) & (variances > 0)
    # Measured on gamma speckle (4 looks) of bench train's training images: over signal spans of 1.5 to 2 the slope
    # read 1.74 to 2.15, on Poisson and Poisson-Gaussian data 0.95 to 1.15; below a span of about 1.2 it wanders.
    if keep.sum() < 3 or levels[keep].max() < MIN_EXPONENT_SPAN * levels[keep].min():
        return None
    slope = np.polyfit(np.log(levels[keep]), np.log(variances[keep]), 1, w=np.sqrt(np.asarray(fit.counts)[keep]))[0]
    return float(slope)


def _suggested_model(fit: PoissonGaussianFit, exponent: float | None, sigma: np.ndarray, low: float,
                     span: float) -> tuple[Any, str, str | None, bool, list[str]]:
    """The noise model (working units) the variance-versus-signal fit points to: gamma speckle when the variance
    grows about as the signal squared, Poisson-Gaussian when it grows with the signal, else Gaussian. Returns the
    model, its kind, the transform to train in, whether the fit is trusted and the notes saying why."""
    from grainwright.inference.noise.models import GammaSpeckle, GaussianNoise, PoissonGaussianNoise

    notes: list[str] = []
    working_gain = fit.gain / span
    working_intercept = (fit.gain * low + fit.intercept) / span**2
    if fit.signal_dependent and exponent is not None and exponent > 1.6:
        levels, variances = np.asarray(fit.levels) - low, np.asarray(fit.variances)
        looks = float(np.median(levels[levels > 0] ** 2 / variances[levels > 0]))
        notes.append(f"noise grows in proportion to the signal (variance exponent {exponent:.1f}): "
                     "multiplicative speckle; train in the log domain")
        return GammaSpeckle(looks=looks), "speckle-gamma", "log", fit.confident, notes
    if fit.signal_dependent:
        read = float(np.sqrt(max(working_intercept, 0.0)))
        notes.append("noise grows with the signal (shot noise): Poisson-Gaussian model, train in the "
                     "generalized-Anscombe domain")
        if not fit.confident:
            notes.append("the Poisson-Gaussian fit is uncertain (few flat regions, narrow or clipped signal range)")
        if working_intercept < 0:
            notes.append(
                f"the fitted variance reaches zero at a signal of {-fit.intercept / max(fit.gain, 1e-30):.4g} "
                "(native): a black-level offset (pedestal); read noise cannot be separated from it and is set to 0"
            )
        model = PoissonGaussianNoise(gain=working_gain, read=read)
        return model, "poisson-gaussian", "anscombe", fit.confident, notes
    notes.append("noise level does not depend on the signal: additive Gaussian model")
    return GaussianNoise(sigma=float(np.mean(sigma)) / span), "gaussian", None, True, notes


def _with_flags(model: Any, kind: str, confident: bool, notes: list[str], impulse: ImpulseFlag,
                banding: BandingFlag, correlation: CorrelationFlag) -> tuple[Any, str, bool]:
    """Impulses join the model as a mixture; banding and correlation add their advice to ``notes``; impulses
    and correlation make the suggestion uncertain."""
    from grainwright.inference.noise.models import ImpulseNoise, MixtureNoise

    if impulse.flagged:
        model = MixtureNoise(components=[model, ImpulseNoise(fraction=min(1.0, 2.0 * impulse.fraction))])
        kind += "+impulse"
        confident = False
        notes.append(f"isolated spikes in {100 * impulse.fraction:.2f}% of pixels: impulse noise (hot pixels or "
                     "salt-and-pepper); a median pre-filter or masking them helps")
    if banding.flagged:
        notes.append("row/column banding (fixed pattern): apply the fixed-pattern correction before training "
                     "and denoising; Noise2Noise cannot remove a pattern present in both shots")
    if correlation.flagged:
        confident = False
        notes.append(
            f"neighbouring noise values are correlated (horizontal {correlation.horizontal:.2f}, vertical "
            f"{correlation.vertical:.2f}): self-supervised schemes assume pixel-independent noise and will keep "
            "part of it; prefer pairs (supervised or Noise2Noise) or raw, undemosaiced, unsharpened data"
        )
    return model, kind, confident


def _speckle_spike_sigma(signal: np.ndarray, looks: float) -> np.ndarray:
    """The per-pixel "sigma" to give ``detect_impulses`` for gamma speckle of ``looks`` looks: 4.5 times it is
    how far above the signal speckle itself reaches as rarely as Gaussian noise passes 4.5 sigma (one-sided,
    3.4e-6). Gamma speckle's upper tail is long (exponential at one look), so 4.5 of its standard deviations
    would flag its own bright grains as impulses. Quantile from ``scipy.special.gammaincinv`` (the regularised
    incomplete gamma function's inverse; unit-mean gamma of L looks)."""
    from scipy.special import gammaincinv

    looks = max(float(looks), 0.1)
    excess = float(gammaincinv(looks, 1.0 - GAUSSIAN_SPIKE_TAIL)) / looks - 1.0
    return np.maximum(signal, 0.0) * excess / 4.5


def analyse_noise(image: np.ndarray, low: float = 0.0, high: float | None = None) -> NoiseAnalysis:
    """Estimate and characterise the noise of one image and suggest a model, a transform and corrections.

    Parameters
    ----------
    image : array
        ``(H, W)`` or ``(H, W, C)``, native values.
    low, high : float
        The full range (e.g. ``Normalization.low`` / ``.high``: 0 and 4095 for 12-bit data); ``high`` defaults
        to the image's maximum.

    Returns
    -------
    NoiseAnalysis
    """
    image = _as_hwc(image).astype(np.float64)
    if min(image.shape[:2]) < MIN_ANALYSED_SIDE:
        raise ValueError(f"an image of {image.shape[0]} x {image.shape[1]} pixels is too small to analyse its noise "
                         f"(at least {MIN_ANALYSED_SIDE} x {MIN_ANALYSED_SIDE})")
    high = float(image.max()) if high is None else float(high)
    span = high - low if high > low else 1.0
    sigma = estimate_sigma(image)
    fit = fit_poisson_gaussian(image)
    exponent = _variance_exponent(fit, low)
    model, kind, transform, confident, notes = _suggested_model(fit, exponent, sigma, low, span)
    local_sigma = None
    if kind == "speckle-gamma":
        local_sigma = _speckle_spike_sigma(ndimage.median_filter(image, size=(3, 3, 1), mode="mirror") - low,
                                           model.looks)
    elif fit.signal_dependent:
        local_sigma = fit.sigma_at(ndimage.median_filter(image, size=(3, 3, 1), mode="mirror"))
    impulse = detect_impulses(image, noise_sigma=local_sigma)
    correlation = detect_correlation(image)
    banding = detect_banding(image)
    model, kind, confident = _with_flags(model, kind, confident, notes, impulse, banding, correlation)
    return NoiseAnalysis(
        low=float(low),
        high=float(high),
        sigma=[float(s) for s in sigma],
        sigma_percent=[float(100.0 * s / span) for s in sigma],
        fit=fit,
        variance_exponent=exponent,
        impulse=impulse,
        banding=banding,
        correlation=correlation,
        kind=kind,
        model=model,
        confident=bool(confident),
        transform=transform,
        notes=notes,
    )
