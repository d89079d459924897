"""Torch mirror of :class:`grainwright.inference.images.normalization.Normalization`, for inside the ONNX graph.

``to_working`` and ``from_working_float`` repeat the numpy functions operation for operation (normalise, then the
optional generalized Anscombe or log transform rescaled to ``[0, 1]``; and back, with the closed-form exact
unbiased inverse of the Anscombe transform, or ``exp`` with the log-domain speckle bias removed), so the exported graph takes and returns native values. The
constants are baked into the graph. ``tests/test_export_working_range.py`` holds both sides together.

``noise_sigma_to_working`` converts a per-pixel noise standard deviation in native units into the working
domain the network sees, by the first-order (delta-method) rule ``sigma_working = |T'(x)| * sigma_native /
(high - low)`` with ``x`` the normalised pixel value and ``T`` the rescaled transform (identity when there is
none). For signal-dependent noise given as ``sqrt(gain * x + read**2)`` in native units, the Anscombe transform
turns it into a constant ``1 / scale`` (``Normalization.working_noise_sigma()``), the level the trainer gives
noise-map models in that domain.

For gamma speckle of ``L`` looks in the log domain (``looks`` in the transform) the delta method falls short: the
native standard deviation ``s / sqrt(L)`` times the slope ``1 / s`` gives ``1 / sqrt(L)``, while the log of the
speckle has the standard deviation ``sqrt(polygamma(1, L))`` (trigamma; 28% more at one look, 6.5% at four). The
conversion multiplies the log slope by ``sqrt(L * polygamma(1, L))``, so the per-pixel speckle level
``sigma(x) = (high - low) * x / sqrt(L)`` (what ``--noise-sigma model`` gives) becomes the exact log-domain level
``sqrt(polygamma(1, L)) / scale`` of ``Normalization.working_noise_sigma()`` wherever ``x`` is well above the
transform's ``epsilon``.
"""
from __future__ import annotations

import math
from typing import Any

import torch
from torch import nn

from grainwright.inference.images.normalization import Normalization

ANSCOMBE_MIN_D = 2.0 * math.sqrt(3.0 / 8.0)  # transform of zero counts; the inverse is clamped below it
SQRT_3_2 = math.sqrt(1.5)


class WorkingRange(nn.Module):
    """Native values <-> working values, in torch, for one :class:`Normalization` (or its ``to_dict()``)."""

    def __init__(self, normalization: Normalization | dict[str, Any]):
        super().__init__()
        if isinstance(normalization, dict):
            normalization = Normalization.from_dict(normalization)
        self.normalization = normalization
        self.low = float(normalization.low)
        self.full_range = float(normalization.high - normalization.low)
        self.transform = dict(normalization.transform) if normalization.transform else None
        self.log_level_factor = speckle_level_factor(self.transform)

    def to_working(self, native: torch.Tensor) -> torch.Tensor:
        """Native values -> working values (mirrors ``Normalization.to_working``)."""
        x = (native - self.low) / self.full_range
        t = self.transform
        if t is None:
            return x
        if t["kind"] == "anscombe":
            ratio = t["read"] / t["gain"]
            d = 2.0 * torch.sqrt(torch.clamp(x / t["gain"] + 0.375 + ratio * ratio, min=0.0))
        else:
            d = torch.log(torch.clamp(x, min=0.0) + t["epsilon"])
        return (d - t["offset"]) / t["scale"]

    def from_working_float(self, working: torch.Tensor) -> torch.Tensor:
        """Working values -> native values, unclipped (mirrors ``Normalization.from_working_float``)."""
        x = working
        t = self.transform
        if t is not None:
            d = x * t["scale"] + t["offset"]
            if t["kind"] == "anscombe":
                x = _anscombe_inverse_exact(d, t["gain"], t["read"])
            else:
                x = torch.exp(d - t.get("bias", 0.0)) - t["epsilon"]
        return x * self.full_range + self.low

    def noise_sigma_to_working(self, sigma_native: torch.Tensor, native: torch.Tensor) -> torch.Tensor:
        """Per-pixel noise standard deviation, native units -> working units (delta method, see module doc).

        Parameters
        ----------
        sigma_native : tensor
            ``(N, 1, H, W)`` (or broadcastable) noise standard deviation in native units.
        native : tensor
            ``(N, C, H, W)`` noisy image in native units; the transform's slope is taken at its channel mean.
        """
        sigma = sigma_native / self.full_range
        t = self.transform
        if t is None:
            return sigma
        x = ((native - self.low) / self.full_range).mean(dim=1, keepdim=True)
        if t["kind"] == "anscombe":
            # T(x) = (2 sqrt(u) - offset) / scale with u = x / gain + 3/8 + (read/gain)**2, so T'(x) = 1 / (gain sqrt(u) scale)
            ratio = t["read"] / t["gain"]
            u = torch.clamp(x / t["gain"] + 0.375 + ratio * ratio, min=0.375)
            slope = 1.0 / (t["gain"] * torch.sqrt(u) * t["scale"])
        else:
            slope = self.log_level_factor / ((torch.clamp(x, min=0.0) + t["epsilon"]) * t["scale"])
        return sigma * slope


def speckle_level_factor(transform: dict[str, Any] | None) -> float:
    """``sqrt(L * polygamma(1, L))`` for a log transform with ``L`` looks (the exact standard deviation of the log
    of unit-mean gamma speckle over its delta-method value ``1 / sqrt(L)``), else 1."""
    if not transform or transform.get("kind") != "log" or "looks" not in transform:
        return 1.0
    from scipy.special import polygamma

    looks = float(transform["looks"])
    return math.sqrt(looks * float(polygamma(1, looks)))


def _anscombe_inverse_exact(d: torch.Tensor, gain: float, read: float) -> torch.Tensor:
    """Closed-form approximation of the exact unbiased inverse (mirrors ``transforms.anscombe_inverse_exact``;
    Makitalo and Foi, IEEE TIP 2011 and 2013)."""
    ratio = read / gain
    d = torch.clamp(d, min=ANSCOMBE_MIN_D)
    inverse_d = 1.0 / d
    closed_form = (
        0.25 * d * d
        + 0.25 * SQRT_3_2 * inverse_d
        - 1.375 * inverse_d * inverse_d
        + 0.625 * SQRT_3_2 * inverse_d * inverse_d * inverse_d
        - 0.125
        - ratio * ratio
    )
    return gain * torch.clamp(closed_form, min=0.0)
