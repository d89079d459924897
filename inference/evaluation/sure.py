"""Ranking denoisers without ground truth: Monte-Carlo SURE.

Stein's unbiased risk estimate (SURE) gives the mean squared error of a denoiser against the unseen clean image
from the noisy image alone, when the noise is Gaussian with a known variance. Monte-Carlo SURE (Ramani, Blu and
Unser 2008) estimates the one term that needs the denoiser's derivatives, its divergence, by probing the
denoiser with one small random perturbation, so it works for any black box: a classical filter or an ONNX model.

For Poisson-Gaussian data the estimate is taken in the generalized-Anscombe domain, where the noise is close to
Gaussian with unit variance: the denoiser is wrapped as ``forward(denoise(inverse(z)))``; or, to first order, on
the untransformed values, with the variance the noise has at each noisy value (:func:`sure_mse_poisson_gaussian`).
"""
from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import asdict, dataclass

import numpy as np
from scipy import ndimage

Denoise = Callable[[np.ndarray], np.ndarray]


@dataclass(frozen=True)
class SureEstimate:
    """One Monte-Carlo SURE figure for one denoiser on one image.

    Attributes
    ----------
    mse : float
        Estimated mean squared error per element, in the units of the image given (may come out slightly
        negative for a denoiser that changes almost nothing; ``psnr`` is then infinite).
    psnr : float
        Estimated PSNR in dB for the given ``peak``.
    psnr_standard_error : float
        One standard error of ``psnr`` in dB from the part SURE cannot know: the energy of this particular
        noise draw (standard deviation ``sqrt(2 * sum(variance**2)) / N`` in the MSE). It shrinks with the pixel
        count; it is the same for every method on the same image, so rankings are finer than this.
    divergence : float
        Monte-Carlo estimate of the variance-weighted divergence, divided by the element count: the average
        effective weight the output gives to each noisy input value (1 for the identity, 0 for a constant).
    epsilon : float
        Size of the probe perturbation actually used, in image units.
    probes : int
        Number of random probes averaged.
    """

    mse: float
    psnr: float
    psnr_standard_error: float
    divergence: float
    epsilon: float
    probes: int

    def to_dict(self) -> dict:
        return asdict(self)


def _variance(sigma: float | np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    """Per-element noise variance from a scalar, a per-channel vector (last axis) or a per-pixel map."""
    sigma = np.asarray(sigma, dtype=np.float64)
    if sigma.ndim == 1 and len(shape) >= 1 and sigma.shape[0] == shape[-1]:
        sigma = sigma.reshape((1,) * (len(shape) - 1) + (-1,))
    return np.broadcast_to(sigma**2, shape)


def psnr_from_mse(mse: float, peak: float) -> float:
    """PSNR in dB of a mean squared error for a signal peak (infinite when ``mse <= 0``)."""
    return math.inf if mse <= 0 else 10.0 * math.log10(peak * peak / mse)


def sure_mse(
    denoise: Denoise,
    noisy: np.ndarray,
    sigma: float | np.ndarray,
    *,
    peak: float = 1.0,
    probes: int = 1,
    epsilon: float | None = None,
    output: np.ndarray | None = None,
    mask: np.ndarray | None = None,
    seed: int = 0,
) -> SureEstimate:
    """Estimate a black-box denoiser's mean squared error without the clean image (Monte-Carlo SURE).

    With ``y = x + n``, ``n`` Gaussian with variance ``v`` per element, and ``f`` the denoiser, Stein's lemma
    gives the unbiased estimate (Ramani, Blu and Unser 2008, eq. 6 and Theorem 2)::

        MSE ~ mean((y - f(y))**2) - mean(v) + (2 / N) * sum(v * b * (f(y + eps * b) - f(y)) / eps)

    where ``b`` is a standard normal probe; the last term is the Monte-Carlo divergence, averaged over
    ``probes`` draws.

    Parameters
    ----------
    denoise : callable
        The denoiser, array in, array of the same shape out. It must be a continuous function of its input:
        an iterative solver that stops on a tolerance jumps between iteration counts under the probe and
        spoils the divergence (seen here with total-variation denoising at its default tolerance).
    noisy : ndarray
        The noisy image (any shape), float.
    sigma : float or ndarray
        Noise standard deviation in the units of ``noisy``: a scalar, one value per channel (last axis) or a
        per-pixel map broadcastable to ``noisy``.
    peak : float
        Signal peak for the PSNR (1.0 in the working range).
    probes : int
        Number of random probes (each costs one more run of the denoiser). One is usually enough for
        images of 10^5 pixels and more; more probes lower the divergence's share of the error.
    epsilon : float, optional
        Probe size in image units. Default ``2 * rms(sigma) * N**-0.3``, a choice from memory of later
        Monte-Carlo SURE practice; Ramani et al. report the estimate flat over a wide range of small values.
    output : ndarray, optional
        ``denoise(noisy)`` when already computed.
    mask : ndarray of bool, optional
        Elements to score (broadcastable to ``noisy``), e.g. leaving out pixels near the clipping levels, where
        the noise is not Gaussian. Stein's identity holds element by element, so the estimate is then the mean
        squared error over those elements; the probe only perturbs them.
    seed : int
        Seed of the probe draws.

    Returns
    -------
    SureEstimate
    """
    noisy = np.asarray(noisy, dtype=np.float64)
    weight = np.ones(noisy.shape) if mask is None else np.broadcast_to(mask, noisy.shape).astype(np.float64)
    count = float(weight.sum())
    if count == 0:
        raise ValueError("SURE needs at least one scored element")
    variance = _variance(sigma, noisy.shape) * weight
    mean_variance = float(variance.sum()) / count
    if epsilon is None:
        epsilon = 2.0 * math.sqrt(mean_variance) * count**-0.3
    if epsilon <= 0:
        raise ValueError("the noise level must be positive for SURE")
    if output is None:
        output = denoise(noisy)
    output = np.asarray(output, dtype=np.float64)

    divergence = _weighted_divergence(denoise, noisy, output, variance, weight, epsilon, probes, seed)
    mse = float(np.sum(weight * (noisy - output) ** 2)) / count - mean_variance + 2.0 * divergence / count
    mse_standard_error = math.sqrt(2.0 * float(np.sum(variance**2))) / count
    # Linearised: d(PSNR) = 10 / ln(10) * d(MSE) / MSE.
    psnr_standard_error = 10.0 / math.log(10.0) * mse_standard_error / mse if mse > 0 else math.inf
    return SureEstimate(mse=mse, psnr=psnr_from_mse(mse, peak), psnr_standard_error=psnr_standard_error,
                        divergence=divergence / count / max(mean_variance, 1e-300), epsilon=float(epsilon),
                        probes=probes)


def _weighted_divergence(denoise: Denoise, noisy: np.ndarray, output: np.ndarray, variance: np.ndarray,
                         weight: np.ndarray, epsilon: float, probes: int, seed: int) -> float:
    """Monte-Carlo estimate of ``sum(v * d f / d y)`` over the scored elements: the mean over ``probes``
    standard normal probes ``b`` (zero outside the mask) of ``sum(v * b * (f(y + eps * b) - f(y))) / eps``."""
    # A spawned stream, so the probe never replays a noise field drawn with default_rng(seed) (a probe equal to
    # the noise would bias the divergence).
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(1,)))
    divergence = 0.0
    for _ in range(probes):
        probe = rng.standard_normal(noisy.shape) * weight
        perturbed = np.asarray(denoise(noisy + epsilon * probe), dtype=np.float64)
        divergence += float(np.sum(variance * probe * (perturbed - output))) / epsilon
    return divergence / probes


def sure_mse_stabilized(
    denoise: Denoise,
    noisy: np.ndarray,
    forward: Callable[[np.ndarray], np.ndarray],
    inverse: Callable[[np.ndarray], np.ndarray],
    *,
    peak: float,
    probes: int = 1,
    epsilon: float | None = None,
    output: np.ndarray | None = None,
    mask: np.ndarray | None = None,
    seed: int = 0,
) -> SureEstimate:
    """Monte-Carlo SURE in a variance-stabilised domain, for Poisson-Gaussian data.

    The generalized Anscombe transform ``forward`` turns Poisson-Gaussian noise into noise close to Gaussian with
    unit variance (Makitalo and Foi 2013). The denoiser, which works on untransformed values, is seen from that
    domain as ``g(z) = forward(denoise(inverse(z)))`` with ``inverse`` the algebraic inverse of ``forward``
    (so that ``inverse(forward(y)) == y``), and SURE with ``sigma = 1`` estimates the mean squared error of
    ``g`` against the stabilised clean image. The figure is a PSNR in the stabilised domain: it ranks methods,
    it is not the PSNR of the untransformed images.

    Parameters
    ----------
    denoise : callable
        The denoiser on untransformed values.
    noisy : ndarray
        Noisy image, untransformed.
    forward, inverse : callable
        The stabilising transform and its algebraic inverse, elementwise.
    peak : float
        Peak of the stabilised signal (``forward(high) - forward(low)``).
    probes, epsilon, output, mask, seed
        As in :func:`sure_mse`; ``output`` is ``denoise(noisy)`` untransformed.

    Returns
    -------
    SureEstimate
        In stabilised units.
    """
    noisy = np.asarray(noisy, dtype=np.float64)
    stabilized = np.asarray(forward(noisy), dtype=np.float64)

    def denoise_stabilized(z: np.ndarray) -> np.ndarray:
        return np.asarray(forward(denoise(inverse(z))), dtype=np.float64)

    stabilized_output = None if output is None else np.asarray(forward(output), dtype=np.float64)
    return sure_mse(
        denoise_stabilized,
        stabilized,
        1.0,
        peak=peak,
        probes=probes,
        epsilon=epsilon,
        output=stabilized_output,
        mask=mask,
        seed=seed,
    )


def sure_mse_poisson_gaussian(
    denoise: Denoise,
    noisy: np.ndarray,
    gain: float,
    read: float,
    *,
    peak: float = 1.0,
    probes: int = 1,
    epsilon: float | None = None,
    seed: int = 0,
) -> SureEstimate:
    """Monte-Carlo estimate of a denoiser's mean squared error on untransformed Poisson-Gaussian data.

    With ``y = gain * P + n``, ``P`` Poisson of mean ``x / gain`` and ``n`` Gaussian of standard deviation
    ``read``, the unbiased risk estimate for mixed Poisson-Gaussian noise (Luisier, Blu and Unser, "Image
    denoising in mixed Poisson-Gaussian noise", IEEE TIP 2011) replaces Stein's Gaussian term by a finite
    difference of the denoiser for the Poisson part (Hudson's identity, ``E[P g(P)] = lambda E[g(P + 1)]``).
    To first order in ``gain`` that difference is the derivative, and the estimate is SURE with the
    per-element variance ``gain * y + read**2`` taken at the noisy value (:func:`sure_mse` with that map); the
    neglected terms carry ``gain**2`` times the denoiser's second derivatives. Unlike
    :func:`sure_mse_stabilized`, the error is measured on the untransformed values, where the PSNR of the
    images is measured, so dark and bright pixels weigh as they do there.

    Parameters
    ----------
    denoise : callable
        The denoiser on untransformed values (for a network trained in the Anscombe domain: the transform, the
        network and the inverse, chained).
    noisy : ndarray
        Noisy image, untransformed, in the units of ``gain`` and ``read``.
    gain : float
        Poisson gain: the noise variance grows by ``gain`` per unit of signal.
    read : float
        Standard deviation of the additive Gaussian part.
    peak, probes, epsilon, seed
        As in :func:`sure_mse`.

    Returns
    -------
    SureEstimate
        In the units of ``noisy``.
    """
    noisy = np.asarray(noisy, dtype=np.float64)
    variance = gain * np.maximum(noisy, 0.0) + read * read
    return sure_mse(denoise, noisy, np.sqrt(variance), peak=peak, probes=probes, epsilon=epsilon, seed=seed)


def unclipped_mask(
    noisy: np.ndarray,
    noise_std: float | np.ndarray,
    *,
    low: float = 0.0,
    high: float = 1.0,
    margin: float = 3.0,
    smoothing: float = 2.0,
) -> np.ndarray:
    """Elements far enough from the clipping levels for their noise to be Gaussian.

    Sensor data is clipped at its range: there the noise is neither zero-mean nor of the stated variance and
    SURE's identity fails (seen here: several dB of error on a sample image with 8% saturated pixels). An
    element is kept when a smoothed copy of the image (Gaussian of ``smoothing`` pixels, per channel) lies more
    than ``margin`` noise standard deviations inside ``[low, high]``.

    Parameters
    ----------
    noisy : ndarray
        ``(H, W)`` or ``(H, W, C)``.
    noise_std : float or ndarray
        Noise standard deviation: scalar, per channel (last axis) or per element.
    low, high : float
        Clipping levels (the working range is ``[0, 1]``).
    """
    noisy = np.asarray(noisy, dtype=np.float64)
    widths = (smoothing, smoothing) + (0.0,) * (noisy.ndim - 2)
    local = ndimage.gaussian_filter(noisy, widths)
    spread = margin * np.sqrt(_variance(noise_std, noisy.shape))
    return (local - spread > low) & (local + spread < high)
