"""Variance-stabilising transforms, elementwise numpy (sqrt, log, powers, maximum only, so that the ONNX export can
mirror them operator for operator).

Generalized Anscombe transform (Murtagh, Starck and Bijaoui 1995; notation of Makitalo and Foi 2013): for data
``z`` whose variance is ``gain * E[z] + read**2`` (Poisson counts scaled by ``gain`` plus Gaussian read noise of
standard deviation ``read``, both in the units of ``z``),

    f(z) = 2 * sqrt(max(z / gain + 3/8 + (read / gain)**2, 0))

has approximately unit variance. Its inverses:

- algebraic: ``z = gain * ((D / 2)**2 - 3/8 - (read / gain)**2)``, biased at low counts;
- exact unbiased: the inverse of ``E[f(z) | signal]``; we use its closed-form approximation
  (Makitalo and Foi, "A closed-form approximation of the exact unbiased inverse of the Anscombe
  variance-stabilizing transformation", IEEE TIP 2011), extended to Poisson-Gaussian data by subtracting
  ``(read / gain)**2`` (Makitalo and Foi, "Optimal inversion of the generalized Anscombe transformation for
  Poisson-Gaussian noise", IEEE TIP 2013). The coefficients below (1/4, sqrt(3/2)/4, -11/8, 5/8 sqrt(3/2), -1/8)
  are written from memory of those papers; the tests check the bias reduction they report.

Log transform for multiplicative speckle (the Anscombe transform does not stabilise it): for ``z = s * u`` with
``u ~ Gamma(L, 1/L)``, ``log z = log s + log u`` has constant variance ``polygamma(1, L)`` (trigamma) and mean
``log s + psi(L) - log L`` (digamma ``psi``): the log of unit-mean speckle is biased low, by about -0.13 at
four looks, which is a 12% darkening after ``exp`` unless the inverse removes it (``speckle_log_mean``; see e.g.
Xie, Pierce and Ulaby, "Statistical properties of logarithmically transformed speckle", IEEE TGRS 2002;
reference from memory).
"""
from __future__ import annotations

import numpy as np

SQRT_3_2 = float(np.sqrt(1.5))


def _anscombe_min_d() -> float:
    """Value of f at zero signal for pure Poisson data, 2 sqrt(3/8): below it the closed form is not used."""
    return 2.0 * float(np.sqrt(3.0 / 8.0))


def anscombe_forward(z: np.ndarray, gain: float, read: float) -> np.ndarray:
    """Generalized Anscombe transform.

    Parameters
    ----------
    z : array
        Data whose variance is ``gain * mean + read**2`` (any units, e.g. counts or fractions of the range).
    gain : float
        Poisson gain, in the units of ``z`` (1.0 for photon counts). Must be > 0.
    read : float
        Standard deviation of the additive Gaussian part, in the units of ``z``.

    Returns
    -------
    array
        Transformed data with noise of approximately unit standard deviation (exact for large counts).
    """
    ratio = read / gain
    return 2.0 * np.sqrt(np.maximum(z / gain + 0.375 + ratio * ratio, 0.0))


def anscombe_inverse_algebraic(d: np.ndarray, gain: float, read: float) -> np.ndarray:
    """Algebraic inverse of ``anscombe_forward``; biased for low counts (kept as the reference it improves on)."""
    ratio = read / gain
    return gain * (0.25 * d * d - 0.375 - ratio * ratio)


def anscombe_inverse_exact(d: np.ndarray, gain: float, read: float) -> np.ndarray:
    """Closed-form approximation of the exact unbiased inverse of the generalized Anscombe transform.

    ``I(D) = D**2/4 + sqrt(3/2)/4 D**-1 - 11/8 D**-2 + 5/8 sqrt(3/2) D**-3 - 1/8 - (read/gain)**2``, clipped at 0
    and multiplied by ``gain`` (Makitalo and Foi 2011, 2013; coefficients from memory, see module docstring).
    ``D`` below ``2 sqrt(3/8)`` (the transform of zero counts) maps to zero signal, where the closed form also
    reaches zero; this keeps the ``D**-3`` term from diverging.
    """
    ratio = read / gain
    d = np.maximum(d, _anscombe_min_d())
    inverse_d = 1.0 / d
    closed_form = (
        0.25 * d * d
        + 0.25 * SQRT_3_2 * inverse_d
        - 1.375 * inverse_d * inverse_d
        + 0.625 * SQRT_3_2 * inverse_d * inverse_d * inverse_d
        - 0.125
        - ratio * ratio
    )
    return gain * np.maximum(closed_form, 0.0)


def log_forward(z: np.ndarray, offset: float) -> np.ndarray:
    """``log(max(z, 0) + offset)``: turns multiplicative speckle into additive noise of constant variance.

    ``offset`` (units of ``z``, > 0) keeps zero-valued pixels finite; pick it near the smallest meaningful signal.
    """
    return np.log(np.maximum(z, 0.0) + offset)


def log_inverse(y: np.ndarray, offset: float, bias: float = 0.0) -> np.ndarray:
    """Inverse of ``log_forward``: ``exp(y - bias) - offset``.

    ``bias`` is the mean of the log of the speckle (``speckle_log_mean``) when ``y`` estimates the mean of the
    log of noisy data (a network trained on noisy targets), 0 when it estimates the log of the clean signal.
    """
    return np.exp(y - bias) - offset


def speckle_log_mean(looks: float) -> float:
    """``E[ln u]`` for unit-mean gamma speckle ``u ~ Gamma(looks, 1/looks)``: ``psi(looks) - ln(looks)``.

    Negative for every number of looks (about -0.1302 at 4 looks, -0.0508 at 10) and tending to 0 as looks grow.
    """
    from scipy.special import digamma

    if not looks > 0:
        raise ValueError(f"looks must be positive, got {looks}")
    return float(digamma(looks) - np.log(looks))
