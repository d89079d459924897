"""Running a Gaussian-noise baseline on other noise: move to a domain where the noise is additive, white and
Gaussian with a known sigma, denoise there, and come back.

- Gaussian: nothing to do.
- Poisson and Poisson-Gaussian (variance ``gain * signal + read^2``): the generalized Anscombe transform gives
  unit variance (Murtagh, Starck and Bijaoui 1995); back through the closed-form approximation of the exact
  unbiased inverse (Makitalo and Foi 2011, 2013). Both from ``grainwright.inference.images.transforms``.
- Multiplicative speckle: the log transform makes it additive with constant variance, ``polygamma(1, L)`` for
  intensity speckle with ``L`` looks (Gamma distributed), ``pi^2 / 24`` for single-look Rayleigh amplitude.
  The log of the noise has a non-zero mean, ``digamma(L) - log(L)`` for Gamma speckle, which is removed
  before going back so that the result estimates the signal's mean rather than its geometric mean.

The noise is given as a number or per-channel array (Gaussian sigma), a noise model from
``grainwright.inference.noise.models`` or its ``to_dict()`` form, e.g. ``{"kind": "poisson-gaussian", "gain": 0.01,
"read": 0.02}``; parameters in working units.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
from scipy.special import polygamma

from grainwright.inference.baselines.registry import denoise
from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images import transforms

# Log-domain offset keeping zero pixels finite, in working units (the value Normalization.with_log uses).
LOG_EPSILON = 1.0 / 256.0
EULER_GAMMA = 0.5772156649015329

NoiseLike = Any  # float, per-channel array, NoiseModel, or its to_dict() form


@dataclass(frozen=True)
class GaussianDomain:
    """Where a Gaussian-noise method can run: ``forward`` the noisy image there, ``inverse`` the estimate back.

    ``sigma`` is the noise standard deviation in that domain (one value or one per channel), ``data_range``
    the span there of the working range [0, 1].
    """

    kind: str
    sigma: float | np.ndarray
    data_range: float
    forward: Callable[[np.ndarray], np.ndarray]
    inverse: Callable[[np.ndarray], np.ndarray]


def _as_dict(noise: NoiseLike) -> dict[str, Any]:
    if hasattr(noise, "to_dict"):
        return noise.to_dict()
    if isinstance(noise, dict):
        return noise
    return {"kind": "gaussian", "sigma": noise}


def _identity(image: np.ndarray) -> np.ndarray:
    return np.asarray(image, dtype=np.float32)


def gaussian_domain(noise: NoiseLike) -> GaussianDomain:
    """The transform pair and the domain sigma for ``noise`` (see the module docstring)."""
    spec = _as_dict(noise)
    kind = spec.get("kind")
    if kind == "gaussian":
        return GaussianDomain("gaussian", spec["sigma"], 1.0, _identity, _identity)
    if kind in ("poisson", "poisson-gaussian"):
        gain, read = float(spec["gain"]), float(spec.get("read", 0.0))
        if gain <= 0:
            raise ConfigError(f"the Anscombe transform needs a positive gain, got {gain}")
        span = float(transforms.anscombe_forward(np.float64(1.0), gain, read)) - float(
            transforms.anscombe_forward(np.float64(0.0), gain, read)
        )
        return GaussianDomain(
            "anscombe",
            1.0,
            span,
            lambda z: transforms.anscombe_forward(z.astype(np.float64), gain, read).astype(np.float32),
            lambda d: transforms.anscombe_inverse_exact(d.astype(np.float64), gain, read).astype(np.float32),
        )
    if kind in ("speckle-gamma", "speckle-rayleigh"):
        if kind == "speckle-gamma":
            looks = float(spec["looks"])
            if looks <= 0:
                raise ConfigError(f"speckle needs a positive number of looks, got {looks}")
            sigma, bias = math.sqrt(float(polygamma(1, looks))), transforms.speckle_log_mean(looks)
        else:
            # Amplitude u = sqrt(2/pi) * sqrt(2 E), E ~ Exp(1): log u = 0.5 log(4/pi) + 0.5 log E, and log E has
            # mean -EULER_GAMMA and variance pi^2 / 6.
            sigma, bias = math.pi / math.sqrt(24.0), 0.5 * math.log(4.0 / math.pi) - 0.5 * EULER_GAMMA
        return GaussianDomain(
            "log",
            sigma,
            math.log((1.0 + LOG_EPSILON) / LOG_EPSILON),
            lambda z: transforms.log_forward(z.astype(np.float64), LOG_EPSILON).astype(np.float32),
            lambda y: transforms.log_inverse(y.astype(np.float64), LOG_EPSILON, bias).astype(np.float32),
        )
    raise ConfigError(
        f"no Gaussian domain for noise of kind {kind!r}: baselines handle gaussian, poisson, poisson-gaussian, "
        "speckle-gamma and speckle-rayleigh"
    )


def denoise_in_domain(name: str, image: np.ndarray, noise: NoiseLike, **params: Any) -> np.ndarray:
    """Denoise ``image`` with baseline ``name`` under ``noise``, through its Gaussian domain.

    Parameters
    ----------
    name : a key of ``registry.BASELINES``.
    image : ``(H, W, C)`` or ``(H, W)`` float image in the working range.
    noise : see the module docstring; a plain number is a Gaussian sigma.
    **params : the baseline's parameters; those in multiples of sigma refer to the domain's sigma.

    Returns
    -------
    float32 estimate in the working range, the input's shape, not clipped.
    """
    domain = gaussian_domain(noise)
    transformed = domain.forward(np.asarray(image))
    return domain.inverse(denoise(name, transformed, domain.sigma, data_range=domain.data_range, **params))
