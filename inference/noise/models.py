"""Noise models by name, for synthesis and for the ``noise.toml`` descriptions the trainer reads.

Every model works in the working range (``clean`` float32 with the native range mapped to ``[0, 1]``, no
variance-stabilising transform applied) and its parameters are in working units, i.e. fractions of the full
native range, unless a key says otherwise. In a TOML description, a dimensioned parameter may instead be given in
native units as ``NAME_native`` together with ``range_native`` (the native full range, e.g. 255 or 4095):
``sigma_native = 10`` with ``range_native = 255`` is ``sigma = 10 / 255``.

Example ``noise.toml``::

    kind = "poisson-gaussian"
    gain = 0.01    # variance = gain * signal + read**2, signal and gain in fractions of the range
    read = 0.02    # standard deviation of the signal-independent part, fraction of the range

Adding a model: a ``NoiseModel`` subclass with ``kind``, its parameters as dataclass fields, ``sample`` and
``sigma_map``, decorated with ``@register`` (see DEVELOPERS.md, "A noise model").
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.common.tomlio import load_toml, write_toml

NOISE_MODELS: dict[str, type["NoiseModel"]] = {}


def register(cls: type["NoiseModel"]) -> type["NoiseModel"]:
    """Class decorator: add a noise model to ``NOISE_MODELS`` under its ``kind``."""
    NOISE_MODELS[cls.kind] = cls
    return cls


@dataclass
class NoiseModel:
    """Base class. Subclasses are dataclasses whose fields are the parameters (working units)."""

    kind: ClassVar[str] = ""
    # Parameters measured in pixel-value units (scaled by the range when given as NAME_native).
    dimensioned: ClassVar[tuple[str, ...]] = ()

    def sample(self, clean: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """A noisy float32 version of ``clean`` (working range); draws come from ``rng`` only."""
        raise NotImplementedError

    def sigma_map(self, clean: np.ndarray) -> np.ndarray | None:
        """Per-pixel noise standard deviation (working units) given the clean signal, or None if undefined."""
        return None

    def check(self) -> None:
        """Raise ``ConfigError`` for parameters outside their domain."""

    def to_dict(self) -> dict[str, Any]:
        """``{"kind": ..., parameter: value, ...}``; round-trips through ``noise_from_dict``."""
        data: dict[str, Any] = {"kind": self.kind}
        for item in fields(self):
            value = getattr(self, item.name)
            if value is None:
                continue
            data[item.name] = [c.to_dict() for c in value] if item.name == "components" else value
        return data

    def describe(self) -> str:
        """One line for reports."""
        params = ", ".join(f"{k}={_short(v)}" for k, v in self.to_dict().items() if k not in ("kind", "components"))
        return f"{self.kind}({params})"

    def _positive(self, **values: float) -> None:
        for name, value in values.items():
            if not (isinstance(value, (int, float)) and value > 0 and math.isfinite(value)):
                raise ConfigError(f"noise '{self.kind}': {name} must be a positive number, got {value!r}")

    def _non_negative(self, **values: float) -> None:
        for name, value in values.items():
            if not (isinstance(value, (int, float)) and value >= 0 and math.isfinite(value)):
                raise ConfigError(f"noise '{self.kind}': {name} must be a number >= 0, got {value!r}")


def _short(value: Any) -> str:
    return f"{value:.4g}" if isinstance(value, float) else str(value)


def _as_float32(clean: np.ndarray) -> np.ndarray:
    return np.asarray(clean, dtype=np.float32)


@register
@dataclass
class GaussianNoise(NoiseModel):
    """Additive white Gaussian noise. ``sigma``: standard deviation, fraction of the full range."""

    kind: ClassVar[str] = "gaussian"
    dimensioned: ClassVar[tuple[str, ...]] = ("sigma",)
    sigma: float = 0.05

    def check(self) -> None:
        self._non_negative(sigma=self.sigma)

    def sample(self, clean, rng):
        clean = _as_float32(clean)
        return clean + np.float32(self.sigma) * rng.standard_normal(clean.shape, dtype=np.float32)

    def sigma_map(self, clean):
        return np.full(np.shape(clean), self.sigma, dtype=np.float32)


@register
@dataclass
class PoissonNoise(NoiseModel):
    """Shot noise: ``noisy = gain * Poisson(clean / gain)``, variance ``gain * clean``.

    ``gain``: fraction of the full range per detected event (``1 / gain`` events at full scale).
    """

    kind: ClassVar[str] = "poisson"
    dimensioned: ClassVar[tuple[str, ...]] = ("gain",)
    gain: float = 0.01

    def check(self) -> None:
        self._positive(gain=self.gain)

    def sample(self, clean, rng):
        clean = _as_float32(clean)
        counts = rng.poisson(np.maximum(clean, 0.0).astype(np.float64) / self.gain)
        return (counts * self.gain).astype(np.float32)

    def sigma_map(self, clean):
        return np.sqrt(self.gain * np.maximum(_as_float32(clean), 0.0)).astype(np.float32)


@register
@dataclass
class PoissonGaussianNoise(NoiseModel):
    """Shot plus read noise: ``gain * Poisson(clean / gain) + read * N(0, 1)``.

    Variance ``gain * clean + read**2`` (Foi et al. 2008's model with ``a = gain``, ``b = read**2``).
    ``gain``: fraction of the full range per event; ``read``: standard deviation, fraction of the full range.
    """

    kind: ClassVar[str] = "poisson-gaussian"
    dimensioned: ClassVar[tuple[str, ...]] = ("gain", "read")
    gain: float = 0.01
    read: float = 0.01

    def check(self) -> None:
        self._positive(gain=self.gain)
        self._non_negative(read=self.read)

    def sample(self, clean, rng):
        clean = _as_float32(clean)
        counts = rng.poisson(np.maximum(clean, 0.0).astype(np.float64) / self.gain)
        noisy = (counts * self.gain).astype(np.float32)
        return noisy + np.float32(self.read) * rng.standard_normal(clean.shape, dtype=np.float32)

    def sigma_map(self, clean):
        return np.sqrt(self.gain * np.maximum(_as_float32(clean), 0.0) + self.read**2).astype(np.float32)


@register
@dataclass
class GammaSpeckle(NoiseModel):
    """Multiplicative speckle of intensity data: ``clean * u``, ``u ~ Gamma(shape=looks, scale=1/looks)``.

    Mean of ``u`` is 1, standard deviation ``1 / sqrt(looks)``. ``looks``: number of looks (dimensionless, > 0).
    """

    kind: ClassVar[str] = "speckle-gamma"
    looks: float = 4.0

    def check(self) -> None:
        self._positive(looks=self.looks)

    def sample(self, clean, rng):
        clean = _as_float32(clean)
        return clean * rng.gamma(self.looks, 1.0 / self.looks, size=clean.shape).astype(np.float32)

    def sigma_map(self, clean):
        return (np.abs(_as_float32(clean)) / np.float32(math.sqrt(self.looks))).astype(np.float32)


@register
@dataclass
class RayleighSpeckle(NoiseModel):
    """Multiplicative speckle of amplitude data (single look): ``clean * u``, ``u`` Rayleigh with mean 1.

    Rayleigh scale ``sqrt(2 / pi)``; standard deviation of ``u`` is ``sqrt(4 / pi - 1)``. No parameters.
    """

    kind: ClassVar[str] = "speckle-rayleigh"

    def sample(self, clean, rng):
        clean = _as_float32(clean)
        return clean * rng.rayleigh(math.sqrt(2.0 / math.pi), size=clean.shape).astype(np.float32)

    def sigma_map(self, clean):
        return (np.abs(_as_float32(clean)) * np.float32(math.sqrt(4.0 / math.pi - 1.0))).astype(np.float32)


@register
@dataclass
class ImpulseNoise(NoiseModel):
    """Salt-and-pepper: a ``fraction`` of pixels (0..1) set to ``salt`` or ``pepper`` (working values).

    ``salt_share``: share of the corrupted pixels set to ``salt`` (0..1; 0.5 means as many salt as pepper).
    """

    kind: ClassVar[str] = "impulse"
    fraction: float = 0.01
    salt_share: float = 0.5
    salt: float = 1.0
    pepper: float = 0.0

    def check(self) -> None:
        if not (0.0 <= self.fraction <= 1.0 and 0.0 <= self.salt_share <= 1.0):
            raise ConfigError(f"noise 'impulse': fraction and salt_share must lie in [0, 1], got {self.fraction}, {self.salt_share}")

    def sample(self, clean, rng):
        noisy = _as_float32(clean).copy()
        draw = rng.random(noisy.shape)
        noisy[draw < self.fraction * self.salt_share] = self.salt
        noisy[(draw >= self.fraction * self.salt_share) & (draw < self.fraction)] = self.pepper
        return noisy


@register
@dataclass
class UniformNoise(NoiseModel):
    """Additive zero-mean uniform noise on ``[-width/2, width/2]``; ``width`` a fraction of the range.

    Standard deviation ``width / sqrt(12)`` (e.g. quantisation noise of a coarser ADC).
    """

    kind: ClassVar[str] = "uniform"
    dimensioned: ClassVar[tuple[str, ...]] = ("width",)
    width: float = 0.05

    def check(self) -> None:
        self._non_negative(width=self.width)

    def sample(self, clean, rng):
        clean = _as_float32(clean)
        return clean + ((rng.random(clean.shape, dtype=np.float32) - np.float32(0.5)) * np.float32(self.width))

    def sigma_map(self, clean):
        return np.full(np.shape(clean), self.width / math.sqrt(12.0), dtype=np.float32)


@register
@dataclass
class LaplacianNoise(NoiseModel):
    """Additive zero-mean Laplacian noise; ``sigma``: standard deviation, fraction of the range.

    The Laplace scale is ``sigma / sqrt(2)``.
    """

    kind: ClassVar[str] = "laplacian"
    dimensioned: ClassVar[tuple[str, ...]] = ("sigma",)
    sigma: float = 0.05

    def check(self) -> None:
        self._non_negative(sigma=self.sigma)

    def sample(self, clean, rng):
        clean = _as_float32(clean)
        return clean + rng.laplace(0.0, self.sigma / math.sqrt(2.0), size=clean.shape).astype(np.float32)

    def sigma_map(self, clean):
        return np.full(np.shape(clean), self.sigma, dtype=np.float32)


@register
@dataclass
class ExponentialNoise(NoiseModel):
    """Additive exponential noise of mean ``scale`` (fraction of the range), standard deviation ``scale``.

    ``centred = true`` (default) subtracts the mean so the noise is zero-mean, as the self-supervised schemes
    assume; ``false`` keeps the one-sided, positive noise.
    """

    kind: ClassVar[str] = "exponential"
    dimensioned: ClassVar[tuple[str, ...]] = ("scale",)
    scale: float = 0.05
    centred: bool = True

    def check(self) -> None:
        self._non_negative(scale=self.scale)

    def sample(self, clean, rng):
        clean = _as_float32(clean)
        draws = rng.exponential(self.scale, size=clean.shape).astype(np.float32)
        return clean + draws - (np.float32(self.scale) if self.centred else np.float32(0.0))

    def sigma_map(self, clean):
        return np.full(np.shape(clean), self.scale, dtype=np.float32)


@register
@dataclass
class BandingNoise(NoiseModel):
    """Row and column fixed-pattern offsets: ``clean + row_offset[y] + column_offset[x]``.

    ``row_sigma`` / ``column_sigma``: standard deviation of the per-row / per-column offsets, fractions of the
    range. ``pattern_seed``: when set, the offsets come from this seed and are the same for every image (a
    sensor's fixed pattern); when absent, each call draws a new pattern from ``rng``.
    """

    kind: ClassVar[str] = "banding"
    dimensioned: ClassVar[tuple[str, ...]] = ("row_sigma", "column_sigma")
    row_sigma: float = 0.01
    column_sigma: float = 0.0
    pattern_seed: int | None = None

    def check(self) -> None:
        self._non_negative(row_sigma=self.row_sigma, column_sigma=self.column_sigma)

    def offsets(self, height: int, width: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Per-row and per-column offsets (working units)."""
        source = np.random.default_rng(self.pattern_seed) if self.pattern_seed is not None else rng
        rows = source.standard_normal(height).astype(np.float32) * np.float32(self.row_sigma)
        columns = source.standard_normal(width).astype(np.float32) * np.float32(self.column_sigma)
        return rows, columns

    def sample(self, clean, rng):
        clean = _as_float32(clean)
        height, width = clean.shape[-3], clean.shape[-2]
        rows, columns = self.offsets(height, width, rng)
        return clean + rows[:, None, None] + columns[None, :, None]

    def sigma_map(self, clean):
        return None  # the pattern is fixed per image, not pixel-independent noise


@register
@dataclass
class MixtureNoise(NoiseModel):
    """Several models applied in turn, in the listed order (e.g. Poisson-Gaussian, then banding, then impulses).

    TOML: ``kind = "mixture"`` and one ``[[components]]`` table per model. ``sigma_map`` combines the
    components that define one in quadrature (their noise adds independently); None if none does.
    """

    kind: ClassVar[str] = "mixture"
    components: list[NoiseModel] = field(default_factory=list)

    def check(self) -> None:
        if not self.components:
            raise ConfigError("noise 'mixture': needs at least one [[components]] table")
        for component in self.components:
            component.check()

    def sample(self, clean, rng):
        noisy = _as_float32(clean)
        for component in self.components:
            noisy = component.sample(noisy, rng)
        return noisy

    def describe(self) -> str:
        return "mixture(" + " then ".join(c.describe() for c in self.components) + ")"

    def sigma_map(self, clean):
        maps = [m for m in (c.sigma_map(clean) for c in self.components) if m is not None]
        if not maps:
            return None
        return np.sqrt(sum(m.astype(np.float32) ** 2 for m in maps)).astype(np.float32)


def noise_from_dict(data: dict[str, Any]) -> NoiseModel:
    """Build a noise model from ``{"kind": ..., parameters...}`` (working units, or ``NAME_native`` with
    ``range_native``). Unknown kinds and keys raise ``ConfigError``."""
    data = dict(data)
    kind = data.pop("kind", None)
    if kind not in NOISE_MODELS:
        raise ConfigError(f"unknown noise kind {kind!r} (known: {', '.join(sorted(NOISE_MODELS))})")
    cls = NOISE_MODELS[kind]
    range_native = data.pop("range_native", None)
    for name in cls.dimensioned:
        native = data.pop(f"{name}_native", None)
        if native is None:
            continue
        if range_native is None or not float(range_native) > 0:
            raise ConfigError(f"noise '{kind}': {name}_native needs range_native (the native full range, > 0)")
        if name in data:
            raise ConfigError(f"noise '{kind}': give either {name} or {name}_native, not both")
        data[name] = float(native) / float(range_native)
    names = {f.name for f in fields(cls)}
    unknown = set(data) - names
    if unknown:
        raise ConfigError(
            f"noise '{kind}': unknown key(s) {', '.join(sorted(unknown))} (known: {', '.join(sorted(names)) or 'none'})"
        )
    if "components" in data:
        if not isinstance(data["components"], list):
            raise ConfigError("noise 'mixture': components must be a list of tables")
        data["components"] = [noise_from_dict(c) for c in data["components"]]
    for name, value in data.items():
        if isinstance(value, int) and not isinstance(value, bool) and name != "pattern_seed":
            data[name] = float(value)
    model = cls(**data)
    model.check()
    return model


def load_noise(path: str | Path) -> NoiseModel:
    """Read a noise description (TOML); errors name the file."""
    try:
        return noise_from_dict(load_toml(path))
    except ConfigError as error:
        raise ConfigError(f"{path}: {error}") from None


def save_noise(model: NoiseModel, path: str | Path, header: str = "") -> None:
    """Write a noise description (TOML, atomically). ``header`` lines become ``#`` comments at the top."""
    lines = "grainwright noise description; parameters in working units (fractions of the full native range)"
    write_toml(path, model.to_dict(), header=lines + ("\n" + header if header else ""))
