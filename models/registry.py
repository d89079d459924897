"""Denoising architectures by name.

Adding an architecture is adding one file: a :class:`~grainwright.models.base.Denoiser` subclass with a ``name``,
listed in ``MODELS`` below, plus its test (``tests/test_models*.py`` runs the shared checks on every entry).
"""
from __future__ import annotations

import inspect
from typing import Any

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.common.suggest import did_you_mean
from grainwright.models.base import DenoisingNetwork
from grainwright.models.multiframe import StackUNetDenoiser
from grainwright.models.residual import ResidualDenoiser
from grainwright.models.residual_noisemap import ResidualNoiseMapDenoiser
from grainwright.models.unet_halfres import UNetHalfResDenoiser
from grainwright.models.unet_noisemap import UNetNoiseMapDenoiser
from grainwright.models.unet_small import UNetSmallDenoiser

MODELS: dict[str, type[DenoisingNetwork]] = {
    cls.name: cls for cls in (ResidualDenoiser, ResidualNoiseMapDenoiser, UNetSmallDenoiser, UNetHalfResDenoiser,
                              StackUNetDenoiser, UNetNoiseMapDenoiser)
}


def _suggest(word: str, choices: list[str]) -> str:
    # difflib's default cutoff (0.6) as before; with no close name the known ones are listed
    return did_you_mean(word, choices, cutoff=0.6) or f" (known: {', '.join(sorted(choices))})"


def architecture(name: str) -> type[DenoisingNetwork]:
    """The class registered as ``name``; a clear error with a suggestion otherwise."""
    if name not in MODELS:
        raise ConfigError(f"unknown architecture '{name}'{_suggest(name, list(MODELS))}")
    return MODELS[name]


def hyper_defaults(name: str) -> dict[str, Any]:
    """Default hyper-parameters of architecture ``name`` (constructor keywords besides ``channels``)."""
    parameters = inspect.signature(architecture(name).__init__).parameters
    return {key: p.default for key, p in parameters.items() if key not in ("self", "channels")}


def build_model(name: str, channels: int, **hyper: Any) -> DenoisingNetwork:
    """Build architecture ``name`` for ``channels`` image channels, randomly initialised.

    Parameters
    ----------
    name : str
        A key of ``MODELS``: ``"residual"``, ``"residual-noisemap"``, ``"unet-small"``, ``"unet-halfres"`` or
        ``"unet-stack"`` (K frames in, the centre frame out) or ``"unet-noisemap"``.
    channels : int
        Image channels in and out (1 for grayscale, 3 for RGB, more for multi-band).
    **hyper
        Architecture hyper-parameters (e.g. ``depth``, ``width``, ``skip``); missing ones take their defaults.

    Raises
    ------
    ConfigError
        Unknown architecture or hyper-parameter (with a close-match suggestion), or a value out of range.
    """
    cls = architecture(name)
    known = hyper_defaults(name)
    for key in hyper:
        if key not in known:
            raise ConfigError(f"architecture '{name}' has no hyper-parameter '{key}'{_suggest(key, list(known))}")
    try:
        return cls(channels, **hyper)
    except (ValueError, TypeError) as error:
        raise ConfigError(f"architecture '{name}': {error}") from None
