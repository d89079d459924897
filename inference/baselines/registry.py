"""Classical denoisers by plain name, with one uniform call.

    from grainwright.inference.baselines.registry import BASELINES, denoise
    out = denoise("bm3d", image, sigma)              # defaults derived from sigma
    out = denoise("nlm", image, sigma, strength=0.8)  # parameters in physical units

``image`` is ``(H, W, C)`` (or ``(H, W)``) float in the working range or any transformed domain where the
noise is additive, white and Gaussian with standard deviation ``sigma`` (one value, or one per channel).
For Poisson-Gaussian or speckle noise use ``grainwright.inference.baselines.domains``.

Adding a baseline is adding one module under ``inference/baselines/`` with a ``BASELINES`` tuple of
``Baseline`` records, and naming the module in ``FAMILIES`` below.
"""
from __future__ import annotations

import importlib
from typing import Any

import numpy as np

from grainwright.inference.baselines.base import Baseline
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.common.suggest import did_you_mean

FAMILIES = ("local", "tv", "wavelet", "nlm", "bm3d")


def _collect() -> dict[str, Baseline]:
    found: dict[str, Baseline] = {}
    for family in FAMILIES:
        module = importlib.import_module(f"grainwright.inference.baselines.{family}")
        for baseline in module.BASELINES:
            if baseline.name in found:
                raise RuntimeError(f"baseline {baseline.name!r} registered twice")
            found[baseline.name] = baseline
    return found


BASELINES: dict[str, Baseline] = _collect()

ALL_CLASSICAL = "all-classical"


def get_baseline(name: str) -> Baseline:
    """The baseline called ``name``; an unknown name raises ``ConfigError`` with suggestions."""
    if name in BASELINES:
        return BASELINES[name]
    hint = did_you_mean(name, BASELINES, most=3, listed=True)
    raise ConfigError(f"unknown baseline {name!r}{hint} (known: {', '.join(BASELINES)})")


def resolve_params(name: str, relative_sigma: float, params: dict[str, Any] | None = None) -> dict[str, Any]:
    """Defaults for a noise level overlaid with ``params``; unknown keys raise ``ConfigError``.

    ``relative_sigma`` is the noise standard deviation as a fraction of the data's full range (in the working
    range, simply sigma).
    """
    baseline = get_baseline(name)
    params = dict(params or {})
    unknown = sorted(set(params) - set(baseline.parameter_names))
    if unknown:
        raise ConfigError(
            f"baseline {name!r} has no parameter {', '.join(map(repr, unknown))} "
            f"(its parameters: {', '.join(baseline.parameter_names)})"
        )
    resolved = baseline.defaults(float(relative_sigma))
    resolved.update(params)
    return resolved


def channel_sigmas(sigma: float | np.ndarray | list[float], channels: int) -> np.ndarray:
    """Per-channel noise standard deviations as a float64 array of length ``channels``."""
    sigmas = np.atleast_1d(np.asarray(sigma, dtype=np.float64)).ravel()
    if sigmas.size == 1:
        sigmas = np.repeat(sigmas, channels)
    if sigmas.size != channels:
        raise ConfigError(f"got {sigmas.size} noise sigmas for an image with {channels} channels")
    if not np.all(np.isfinite(sigmas)) or np.any(sigmas <= 0):
        raise ConfigError(f"noise sigma must be positive and finite, got {sigmas.tolist()}")
    return sigmas


def denoise(
    name: str, image: np.ndarray, sigma: float | np.ndarray, *, data_range: float = 1.0, **params: Any
) -> np.ndarray:
    """Denoise ``image`` with the baseline ``name``; additive white Gaussian noise of std ``sigma``.

    Parameters
    ----------
    name : a key of ``BASELINES``.
    image : ``(H, W, C)`` or ``(H, W)`` array, float (working range or a transformed domain).
    sigma : noise standard deviation in the image's units, one value or one per channel. Channels with
        different sigmas are rescaled to their mean sigma before filtering and back after, which is exact
        for every registered baseline because their parameters scale with sigma.
    data_range : the full range of the data in the image's units (1.0 in the working range; the span of the
        transformed range in a transformed domain); only the sigma-derived defaults use it.
    **params : the baseline's parameters in physical units; the rest come from its sigma-derived defaults.

    Returns
    -------
    float32 array of the input's shape, not clipped.
    """
    baseline = get_baseline(name)
    array = np.asarray(image)
    if array.ndim not in (2, 3) or array.size == 0:
        raise InputError(None, f"expected an (H, W, C) or (H, W) image, got shape {array.shape}")
    if not np.issubdtype(array.dtype, np.floating):
        raise InputError(None, f"expected a float image in the working range, got dtype {array.dtype}")
    if not np.all(np.isfinite(array)):
        raise InputError(None, "image has NaN or infinite pixels")
    work = array[:, :, None] if array.ndim == 2 else array
    sigmas = channel_sigmas(sigma, work.shape[2])
    common = float(np.mean(sigmas))
    scale = (common / sigmas).astype(np.float32)
    resolved = resolve_params(name, common / data_range, params)
    out = baseline.function(np.ascontiguousarray(work * scale, dtype=np.float32), common, **resolved)
    out = (out / scale).astype(np.float32)
    return out.reshape(array.shape)
