"""What a classical baseline declares: its function, its parameters in physical units, its grids and defaults.

Every baseline function has the same call, ``function(image, sigma, **params) -> image``:

- ``image`` is ``(H, W, C)`` float32 in the working range (or any affine rescaling of it, such as the
  Anscombe domain); the function returns the same shape and dtype and never clips, because the caller may
  be in a transformed domain;
- ``sigma`` is one float: the standard deviation of additive white Gaussian noise, in the image's units,
  the same for every channel (``registry.denoise`` equalises unequal channels before the call).

Parameters are physical: a radius or a width in pixels, a strength as a multiple of ``sigma``, or a
named choice. Each parameter lists a small ground-truth search grid and a smaller grid for J-invariant
calibration; a value left out of a grid keeps its default, which the baseline derives from the noise level
relative to the data's full range.
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

BaselineFunction = Callable[..., np.ndarray]


@dataclass(frozen=True)
class Parameter:
    """One tunable parameter of a baseline.

    Attributes
    ----------
    name : keyword passed to the baseline function.
    unit : "pixels", "x sigma", "choice", ...: how to read a value.
    help : one line saying what the parameter does.
    search : values tried by the ground-truth grid search (empty: keep the default).
    calibration : values tried by J-invariant calibration, usually fewer (empty: keep the default).
    """

    name: str
    unit: str
    help: str
    search: tuple[Any, ...] = ()
    calibration: tuple[Any, ...] = ()


@dataclass(frozen=True)
class Baseline:
    """A classical denoiser registered by a plain name.

    Attributes
    ----------
    name : registry key, e.g. ``"bm3d"``.
    title : method and source for tables and docs, e.g. ``"BM3D (Dabov et al. 2007)"``.
    function : ``function(image, sigma, **params)``, see the module docstring.
    parameters : the tunable parameters, in physical units.
    defaults : ``defaults(relative_sigma) -> dict`` with a value for every parameter, where ``relative_sigma``
        is the noise standard deviation as a fraction of the data's full range.
    """

    name: str
    title: str
    function: BaselineFunction
    parameters: tuple[Parameter, ...]
    defaults: Callable[[float], dict[str, Any]]
    notes: str = field(default="")

    @property
    def parameter_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.parameters)

    def grid(self, kind: str = "search") -> list[dict[str, Any]]:
        """Every combination of the ``kind`` grid ("search" or "calibration"), as keyword dicts.

        Parameters left out of the grid are not in the dicts; the caller fills them from ``defaults``.
        """
        if kind not in ("search", "calibration"):
            raise ValueError(f"grid kind must be 'search' or 'calibration', not {kind!r}")
        axes = [(p.name, getattr(p, kind)) for p in self.parameters if getattr(p, kind)]
        if not axes:
            return [{}]
        names = [name for name, _ in axes]
        return [dict(zip(names, values)) for values in itertools.product(*(values for _, values in axes))]


def by_noise_level(relative_sigma: float, low: Any, medium: Any, high: Any) -> Any:
    """Pick a default by noise level relative to the full range: below 15/255, below 35/255, above.

    The bands are ours: they separate the noise levels at which our grid search picked different values.
    """
    level = relative_sigma * 255.0
    return low if level < 15 else medium if level < 35 else high


def per_channel(function: Callable[[np.ndarray], np.ndarray], image: np.ndarray) -> np.ndarray:
    """Apply a 2-D filter to each channel of an ``(H, W, C)`` image."""
    out = np.empty_like(image)
    for c in range(image.shape[2]):
        out[:, :, c] = function(image[:, :, c])
    return out
