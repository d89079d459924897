"""The one mapping between native pixel values and the network's float32 working range.

``working = T((native - low) / (high - low))`` where ``T`` is an optional variance-stabilising transform
(see ``grainwright.inference.images.transforms``). The description is small, plain data (``to_dict``/``from_dict``),
travels in checkpoints and in the ONNX metadata, and the ONNX export mirrors ``to_working`` and
``from_working_float`` operator for operator, so training and inference cannot disagree.

Transforms (``transform`` dict, all parameters in working units, i.e. fractions of ``high - low``):

- ``{"kind": "anscombe", "gain": g, "read": r, "offset": f(0), "scale": f(1) - f(0)}``: the generalized
  Anscombe transform ``f`` for noise of variance ``g * x + r**2`` (``x`` the normalised signal), rescaled to
  ``(f(x) - offset) / scale`` so that the signal range ``[0, 1]`` stays ``[0, 1]``. The noise then has a
  standard deviation of about ``1 / scale`` everywhere (``working_noise_sigma()``). The inverse is the
  closed-form exact unbiased inverse (Makitalo and Foi 2011/2013).
- ``{"kind": "log", "epsilon": e, "offset": log(e), "scale": log(1 + e) - log(e), "looks": L, "bias": b}``:
  for multiplicative speckle, ``(log(x + e) - offset) / scale``; with ``L`` looks of gamma speckle the noise
  standard deviation is ``sqrt(polygamma(1, L)) / scale`` (``looks`` is optional). ``bias`` (optional, default
  0) is subtracted in the log domain before ``exp`` on the way back: a network trained on noisy targets in the
  log domain estimates ``log s + E[ln u]``, and for gamma speckle ``E[ln u] = psi(L) - ln L``
  (``transforms.speckle_log_mean``), so its output is ``exp(E[ln u])`` (12% at four looks) too dark unless
  ``bias`` removes it. A network trained on clean targets needs no bias.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images import transforms
from grainwright.inference.images.imageio import effective_bit_depth

CHANNEL_ORDERS = {1: "gray", 3: "rgb", 4: "rgba"}
TRANSFORM_KINDS = ("anscombe", "log")


@dataclass
class Normalization:
    """How native pixel values map to the float32 working range and back.

    Attributes
    ----------
    dtype : str
        Native dtype name, e.g. ``"uint16"``.
    bit_depth : int or None
        Effective bit depth of integer data (e.g. 12 for 12-bit data in uint16); None for float data.
    low, high : float
        Native values mapped to 0 and 1 before the transform.
    channels : int
        Channel count C.
    channel_order : str
        ``"gray"``, ``"rgb"``, ``"rgba"`` or ``"channels"`` (anything else).
    transform : dict or None
        Variance-stabilising transform and its parameters in working units (see module docstring).
    """

    dtype: str
    bit_depth: int | None
    low: float
    high: float
    channels: int
    channel_order: str = "gray"
    transform: dict[str, Any] | None = field(default=None)

    def __post_init__(self) -> None:
        if not self.high > self.low:
            raise ConfigError(f"normalisation range is empty: low={self.low}, high={self.high}")
        if self.transform is not None and self.transform.get("kind") not in TRANSFORM_KINDS:
            raise ConfigError(
                f"unknown transform kind {self.transform.get('kind')!r} (known: {', '.join(TRANSFORM_KINDS)})"
            )

    # ----------------------------------------------------------------------------------------- construction
    @classmethod
    def for_array(cls, array: np.ndarray, bit_depth: int | None = None) -> "Normalization":
        """Describe an image or stack (``(..., H, W, C)``) by its dtype and effective bit depth.

        Unsigned integers map ``[0, 2**bit_depth - 1]`` to ``[0, 1]`` (``bit_depth`` detected by
        ``effective_bit_depth`` unless given). Signed integers map the dtype's full range. Float data within
        ``[-0.5, 1.5]`` is taken as unit-range data (noise may overshoot ``[0, 1]``) and keeps ``[0, 1]``;
        other float data maps its own minimum and maximum (normalise a whole set with one description: pass
        the stack, or build it once and reuse it).
        """
        array = np.asarray(array)
        channels = int(array.shape[-1]) if array.ndim >= 3 else 1
        order = CHANNEL_ORDERS.get(channels, "channels")
        dtype = array.dtype
        if dtype.kind == "u":
            bits = int(bit_depth) if bit_depth is not None else effective_bit_depth(array)
            if not 1 <= bits <= dtype.itemsize * 8:
                raise ConfigError(f"bit depth {bits} does not fit {dtype} data")
            return cls(dtype.name, bits, 0.0, float(2**bits - 1), channels, order)
        if dtype.kind == "i":
            info = np.iinfo(dtype)
            return cls(dtype.name, dtype.itemsize * 8, float(info.min), float(info.max), channels, order)
        if dtype.kind == "f":
            low, high = float(np.min(array)), float(np.max(array))
            if low >= -0.5 and high <= 1.5:  # unit-range data, noise overshooting [0, 1] included
                low, high = 0.0, 1.0
            elif high <= low:
                high = low + 1.0
            return cls(dtype.name, None, low, high, channels, order)
        raise ConfigError(f"cannot normalise {dtype} data")

    def with_anscombe(self, gain: float, read: float) -> "Normalization":
        """A copy with the generalized Anscombe transform for noise variance ``gain * x + read**2``.

        ``gain`` and ``read`` are in working units (fractions of ``high - low``; ``read`` a standard deviation).
        """
        if not gain > 0:
            raise ConfigError(f"the Anscombe transform needs a positive gain, got {gain}")
        start = float(transforms.anscombe_forward(np.float64(0.0), gain, read))
        end = float(transforms.anscombe_forward(np.float64(1.0), gain, read))
        transform = {"kind": "anscombe", "gain": float(gain), "read": float(read), "offset": start, "scale": end - start}
        return Normalization(**{**asdict(self), "transform": transform})

    def with_log(self, epsilon: float = 1.0 / 256.0, looks: float | None = None,
                 noisy_targets: bool = False) -> "Normalization":
        """A copy with the log transform for multiplicative speckle; ``epsilon`` in working units (> 0).

        ``looks``: the number of looks of gamma speckle, if known. ``noisy_targets``: the network learns from
        noisy targets (every scheme but supervised), so its output is biased by the mean of the log of the
        speckle, which the inverse then removes (needs ``looks``; see the module docstring).
        """
        if not epsilon > 0:
            raise ConfigError(f"the log transform needs a positive epsilon, got {epsilon}")
        if noisy_targets and looks is None:
            raise ConfigError("the log-domain bias correction for noisy targets needs the number of looks")
        start, end = math.log(epsilon), math.log(1.0 + epsilon)
        transform = {"kind": "log", "epsilon": float(epsilon), "offset": start, "scale": end - start}
        if looks is not None:
            transform["looks"] = float(looks)
        if noisy_targets:
            transform["bias"] = transforms.speckle_log_mean(float(looks))
        return Normalization(**{**asdict(self), "transform": transform})

    # ------------------------------------------------------------------------------------------ mapping
    def to_working(self, native: np.ndarray) -> np.ndarray:
        """Native values -> float32 working values (normalise, then transform)."""
        x = (np.asarray(native, dtype=np.float32) - np.float32(self.low)) / np.float32(self.high - self.low)
        t = self.transform
        if t is None:
            return x.astype(np.float32, copy=False)
        if t["kind"] == "anscombe":
            d = transforms.anscombe_forward(x, np.float32(t["gain"]), np.float32(t["read"]))
        else:
            d = transforms.log_forward(x, np.float32(t["epsilon"]))
        return ((d - np.float32(t["offset"])) / np.float32(t["scale"])).astype(np.float32, copy=False)

    def from_working_float(self, working: np.ndarray) -> np.ndarray:
        """Working values -> float32 native values (inverse transform, unmap), neither clipped nor rounded."""
        x = np.asarray(working, dtype=np.float32)
        t = self.transform
        if t is not None:
            d = x * np.float32(t["scale"]) + np.float32(t["offset"])
            if t["kind"] == "anscombe":
                x = transforms.anscombe_inverse_exact(d, np.float32(t["gain"]), np.float32(t["read"]))
            else:
                x = transforms.log_inverse(d, np.float32(t["epsilon"]), np.float32(t.get("bias", 0.0)))
        native = x * np.float32(self.high - self.low) + np.float32(self.low)
        return native.astype(np.float32, copy=False)

    def from_working(self, working: np.ndarray, dtype: np.dtype | str | None = None) -> np.ndarray:
        """Working values -> native array of ``dtype`` (default the native dtype).

        Integer dtypes: clipped to ``[low, high]`` (and to the dtype's range) and rounded to the nearest integer.
        """
        native = self.from_working_float(working)
        dtype = np.dtype(dtype if dtype is not None else self.dtype)
        if dtype.kind in "iu":
            info = np.iinfo(dtype)
            low, high = max(self.low, info.min), min(self.high, info.max)
            return np.clip(np.rint(native), low, high).astype(dtype)
        return native.astype(dtype)

    # --------------------------------------------------------------------------------------- noise units
    @property
    def full_range(self) -> float:
        """``high - low`` in native units: one working unit before any transform."""
        return float(self.high - self.low)

    def working_noise_sigma(self) -> float | None:
        """Standard deviation of the noise in working units where the transform makes it constant.

        Anscombe: ``1 / scale`` (the transform gives unit variance before rescaling; accurate from about ten
        counts up, lower for fewer). Log with ``looks`` known: ``sqrt(polygamma(1, looks)) / scale``.
        No transform, or log without ``looks``: None (the noise model, not the normalisation, knows the level).
        """
        t = self.transform
        if t is None:
            return None
        if t["kind"] == "anscombe":
            return 1.0 / float(t["scale"])
        if "looks" in t:
            from scipy.special import polygamma

            return math.sqrt(float(polygamma(1, float(t["looks"])))) / float(t["scale"])
        return None

    # ---------------------------------------------------------------------------------------- serialise
    def to_dict(self) -> dict[str, Any]:
        """Plain JSON/TOML-serialisable dict (``transform`` omitted when None)."""
        data = asdict(self)
        if data["transform"] is None:
            del data["transform"]
        return data

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "Normalization":
        """Inverse of ``to_dict``; unknown or missing keys raise ``ConfigError``."""
        known = {"dtype", "bit_depth", "low", "high", "channels", "channel_order", "transform"}
        unknown = set(data) - known
        if unknown:
            raise ConfigError(f"normalisation: unknown key(s) {', '.join(sorted(unknown))}")
        try:
            return cls(
                dtype=str(data["dtype"]),
                bit_depth=None if data.get("bit_depth") is None else int(data["bit_depth"]),
                low=float(data["low"]),
                high=float(data["high"]),
                channels=int(data["channels"]),
                channel_order=str(data.get("channel_order", CHANNEL_ORDERS.get(int(data["channels"]), "channels"))),
                transform=None if data.get("transform") is None else dict(data["transform"]),
            )
        except KeyError as missing:
            raise ConfigError(f"normalisation: missing key {missing}") from None
