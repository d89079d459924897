"""Run an exported grainwright ONNX model on images of any size with ONNX Runtime, tile by tile, without seams.

>>> from grainwright.inference.runtime.runner import OnnxDenoiser
>>> denoiser = OnnxDenoiser("model.onnx", threads=2)          # doctest: +SKIP
>>> clean = denoiser.run(noisy)                           # (H, W, C) native array in, same dtype out  # doctest: +SKIP

The ONNX graph takes native pixel values (float32, N x C x H x W) and returns native values; normalisation and
any variance-stabilising transform happen inside it. This module only pads, tiles, batches, averages the optional
flip/rotation self-ensemble, applies the strength setting and converts back to the input's dtype. The tiling rule
is in :mod:`grainwright.inference.runtime.tiling`.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import onnxruntime as ort

from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.images.alignment import ALIGN_REVISIONS, ALIGNMENTS, recorded_revision
from grainwright.inference.noise.estimation import estimate_sigma
from grainwright.inference.noise.models import NoiseModel, noise_from_dict
from grainwright.inference.runtime.modelinfo import (
    METADATA_KEY, check_metadata, has_level_map, noise_map_source,
)
from grainwright.inference.runtime.tiling import (
    Tile,
    TilePlan,
    batched,
    default_tile,
    pad_to_alignment,
    plan_tiles,
    round_up,
    tile_margin,
)

# Window pixels per ONNX Runtime call when the caller does not choose a batch size: a few default tiles per
# call, which bounds activation memory (48 channels x 4 B x 400k pixels = 77 MB per layer). On the shared
# reference machine 1, ~4 and ~16 tiles per call measured alike within the noise (docs/benchmarks.md, runtime).
DEFAULT_BATCH_PIXELS = 400_000

# Self-ensemble members: (transpose, flip rows, flip columns) applied to (N, C, H, W) arrays. The first 2 are the
# identity and a left-right flip, the first 4 all flips, all 8 the flips and 90-degree rotations of the square.
ENSEMBLE_TRANSFORMS: tuple[tuple[bool, bool, bool], ...] = (
    (False, False, False),
    (False, False, True),
    (False, True, False),
    (False, True, True),
    (True, False, False),
    (True, False, True),
    (True, True, False),
    (True, True, True),
)
ENSEMBLE_SIZES = (1, 2, 4, 8)
NOISE_SIGMA_MODES = ("auto", "estimate", "training", "model")


def _transform(batch: np.ndarray, member: tuple[bool, bool, bool]) -> np.ndarray:
    transpose, flip_rows, flip_cols = member
    if flip_rows:
        batch = batch[:, :, ::-1]
    if flip_cols:
        batch = batch[:, :, :, ::-1]
    if transpose:
        batch = batch.transpose(0, 1, 3, 2)
    return np.ascontiguousarray(batch)


def _untransform(batch: np.ndarray, member: tuple[bool, bool, bool]) -> np.ndarray:
    transpose, flip_rows, flip_cols = member
    if transpose:
        batch = batch.transpose(0, 1, 3, 2)
    if flip_cols:
        batch = batch[:, :, :, ::-1]
    if flip_rows:
        batch = batch[:, :, ::-1]
    return batch


def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes, hex."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


@dataclass(frozen=True)
class ModelSpec:
    """What the runtime needs to know about a model, from its metadata (or supplied by hand).

    Sizes are in pixels; ``training_sigma`` is the noise standard deviation seen in training in native units
    (None when unknown); ``low``/``high`` are the native range the model was trained for (None: the dtype's).
    """

    receptive_field: int
    alignment: int = 1
    margin: int | None = None
    channels: int | None = None
    takes_noise_map: bool = False
    architecture: str = "unknown"
    macs_per_pixel: float | None = None
    low: float | None = None
    high: float | None = None
    dtype: str | None = None
    training_sigma: float | None = None
    training_bit_depth: int | None = None
    stack_frames: int = 1
    stack_axis: str | None = None
    stack_alignment: str = "none"
    stack_align_revision: int | None = None
    metadata: dict[str, Any] = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        if self.receptive_field < 1 or self.alignment < 1:
            raise ConfigError(f"receptive field ({self.receptive_field}) and alignment ({self.alignment}) "
                              "must be positive")
        needed = tile_margin(self.receptive_field, self.alignment)
        if self.margin is None:
            object.__setattr__(self, "margin", needed)
        else:  # a margin below the radius would leave seams; off the alignment grid would shift pooling phases
            object.__setattr__(self, "margin", max(round_up(self.margin, self.alignment), needed))

    @classmethod
    def from_metadata(cls, metadata: dict[str, Any]) -> "ModelSpec":
        """Build from the JSON document an exported model carries under the ``grainwright`` key (written by
        ``grainwright.models.export.build_metadata``)."""
        if metadata.get("receptive_field") is None:
            raise ConfigError("model metadata has no receptive_field")

        def number(key: str, kind: type = float, source: dict[str, Any] = metadata) -> Any:
            value = source.get(key)
            return None if value is None else kind(value)

        normalization = metadata.get("normalization") or {}
        stack = metadata.get("stack") or {}
        return cls(
            receptive_field=int(metadata["receptive_field"]),
            alignment=int(metadata.get("alignment", 1)),
            margin=number("tile_margin", int),
            channels=number("channels", int),
            takes_noise_map=bool(metadata.get("takes_noise_map", False)),
            architecture=str((metadata.get("architecture") or {}).get("name", "unknown")),
            macs_per_pixel=number("macs_per_pixel"),
            low=number("low", source=normalization),
            high=number("high", source=normalization),
            dtype=normalization.get("dtype"),
            training_sigma=number("sigma_native", source=metadata.get("training_noise") or {}),
            training_bit_depth=number("bit_depth", int, source=normalization),
            stack_frames=int(stack.get("frames", 1)),
            stack_axis=stack.get("axis"),
            stack_alignment=str(stack.get("align_neighbours", "none")),
            stack_align_revision=recorded_revision(stack),  # format 3 files carry none: revision 1
            metadata=dict(metadata),
        )


def native_range(dtype: np.dtype, spec: ModelSpec) -> tuple[float, float] | None:
    """Range integer outputs are clipped to: the model's native range for its own dtype, else the dtype's."""
    dtype = np.dtype(dtype)
    if not np.issubdtype(dtype, np.integer):
        return None
    if spec.dtype == dtype.name and spec.low is not None and spec.high is not None:
        return spec.low, spec.high
    info = np.iinfo(dtype)
    return float(info.min), float(info.max)


def to_dtype(values: np.ndarray, dtype: np.dtype, spec: ModelSpec) -> np.ndarray:
    """Native float32 output to ``dtype``: clip to the native range and round for integers."""
    bounds = native_range(dtype, spec)
    if bounds is None:
        return values.astype(dtype, copy=False)
    return np.clip(np.rint(values), bounds[0], bounds[1]).astype(dtype)


class OnnxDenoiser:
    """An exported model ready to run on native ``(H, W, C)`` arrays of any size.

    Parameters
    ----------
    model : str or Path
        The ``.onnx`` file written by ``grainwright export``.
    threads : int, optional
        ONNX Runtime intra-op threads (default: all cores).
    tile : int, optional
        Largest edge in pixels of each tile's kept region; the margin is added around it. Tiles are evened out
        per image so that the last one is not mostly wasted. Larger than the image means one tile. Default:
        measured, and large enough that the overlap costs at most 15 % extra computation.
    batch : int, optional
        Tiles per ONNX Runtime call (default: about ``DEFAULT_BATCH_PIXELS`` window pixels per call).
    strength : float
        For noise-map models, a factor on the noise map (0.5 denoises as if the noise were half as strong).
        For other models, a blend: ``output = input + strength * (model output - input)``.
    noise_sigma : float or "auto" or "estimate" or "training" or "model"
        Noise-map models only: "auto" (the default: as the file's metadata states in ``noise_map.source``, or
        for files exported before that entry by the same rule, :func:`modelinfo.derived_noise_map_source`: "model"
        for a model working in a variance-stabilised domain whose metadata carries a noise model with a
        per-pixel level, such as Poisson-Gaussian noise through the Anscombe transform or gamma speckle through the
        log, where the transform and not the image sets the level the network sees, and for a supervised model of
        signal-dependent noise, which trained on that map; "estimate" otherwise), the noise standard deviation in
        native units, "estimate"
        (per image, MAD
        estimator of Donoho & Johnstone 1994), or "training" (the level in the model's metadata), or "model"
        (a per-pixel map from the training noise model, e.g. ``sqrt(gain * x + read**2)`` for Poisson-Gaussian
        noise after Foi et al. 2008, evaluated on the noisy input as the estimate of ``x``).
    ensemble : int
        1, 2, 4 or 8: average over that many flips / 90-degree rotations (self-ensemble).
    spec : ModelSpec, optional
        Tiling figures supplied by hand, for a model without grainwright metadata.
    """

    def __init__(
        self,
        model: str | Path,
        *,
        threads: int | None = None,
        tile: int | None = None,
        batch: int | None = None,
        strength: float = 1.0,
        noise_sigma: float | str = "auto",
        ensemble: int = 1,
        spec: ModelSpec | None = None,
    ):
        self.path = Path(model)
        if not self.path.is_file():
            raise InputError(self.path, "model file not found")
        if ensemble not in ENSEMBLE_SIZES:
            raise ConfigError(f"--ensemble must be one of {ENSEMBLE_SIZES}, got {ensemble}")
        if not np.isfinite(strength) or strength < 0:
            raise ConfigError(f"--strength must be a non-negative number, got {strength}")
        if isinstance(noise_sigma, str) and noise_sigma not in NOISE_SIGMA_MODES:
            raise ConfigError(f"noise sigma must be a number or one of {NOISE_SIGMA_MODES}, got {noise_sigma!r}")
        self.threads = int(threads or os.cpu_count() or 1)
        options = ort.SessionOptions()
        options.intra_op_num_threads = self.threads
        options.inter_op_num_threads = 1
        options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        options.log_severity_level = 4  # fatal only: a failure is reported once, by the caller, naming the file
        try:
            self.session = ort.InferenceSession(str(self.path), options, providers=["CPUExecutionProvider"])
        except Exception as error:  # ORT raises its own exception types for unreadable graphs
            raise InputError(self.path, f"not a loadable ONNX model ({str(error).splitlines()[0]})") from None
        self.metadata = self._read_metadata()
        if spec is None:
            if self.metadata is None:
                raise InputError(self.path, "model has no grainwright metadata (export it with 'grainwright "
                                 "export', or give --receptive-field and --alignment by hand)")
            spec = ModelSpec.from_metadata(self.metadata)
        if spec.stack_alignment not in ALIGNMENTS:
            raise InputError(self.path, f"unknown neighbour alignment {spec.stack_alignment!r} in the model's stack "
                             f"entry (this grainwright knows {', '.join(ALIGNMENTS)}); update grainwright")
        current = ALIGN_REVISIONS.get(spec.stack_alignment)
        if spec.stack_alignment != "none" and spec.stack_align_revision != current:
            remedy = ("update grainwright" if (spec.stack_align_revision or 1) > current
                      else "train it again (docs/stacks-and-volumes.md)")
            raise InputError(self.path, f"was trained on neighbours aligned by revision {spec.stack_align_revision} of "
                             f"the {spec.stack_alignment} alignment; this grainwright computes revision {current}, "
                             f"which the model has not seen: {remedy}")
        inputs = {node.name for node in self.session.get_inputs()}
        if "image" not in inputs:
            raise InputError(self.path, f"model has no input named 'image' (inputs: {sorted(inputs)})")
        # The graph itself says whether it takes a noise map and, when fixed, how many channels; hand-supplied
        # figures need not.
        spec = dataclasses.replace(spec, takes_noise_map="noise_sigma" in inputs)
        if spec.channels is None:  # metadata (which may stack frames on the channel axis) says it otherwise
            spec = dataclasses.replace(spec, channels=self._declared_channels())
        self.spec = spec
        if spec.takes_noise_map and noise_sigma == "training" and spec.training_sigma is None:
            raise ConfigError(f"{self.path}: metadata has no training noise level; give a number or 'estimate'")
        if noise_sigma == "auto":
            noise_sigma = self._automatic_noise_sigma()
        self.noise_model = self._noise_model(noise_sigma) if spec.takes_noise_map else None
        self.output_name = self.session.get_outputs()[0].name
        self.tile = int(tile) if tile else default_tile(spec.margin, spec.alignment)
        self.batch = int(batch) if batch else None
        self.strength = float(strength)
        self.noise_sigma = noise_sigma
        self.ensemble = int(ensemble)

    def _declared_channels(self) -> int | None:
        """The channel count the graph's ``image`` input declares (N x C x H x W), or None when symbolic."""
        shape = next(node.shape for node in self.session.get_inputs() if node.name == "image")
        return shape[1] if len(shape) == 4 and isinstance(shape[1], int) and shape[1] > 0 else None

    def _read_metadata(self) -> dict[str, Any] | None:
        text = self.session.get_modelmeta().custom_metadata_map.get(METADATA_KEY)
        if text is None:
            return None
        try:
            return check_metadata(json.loads(text), self.path)
        except json.JSONDecodeError:
            raise InputError(self.path, "grainwright metadata is not valid JSON") from None

    def _automatic_noise_sigma(self) -> str:
        """"model" where the file's noise map comes from its training noise model (``noise_map.source``, or for
        older files the exporter's rule: :func:`modelinfo.derived_noise_map_source`), else "estimate"."""
        if not self.spec.takes_noise_map or self.spec.high is None:
            return "estimate"
        return "model" if noise_map_source(self.metadata or {}, self.path) == "noise-model" else "estimate"

    def _described_noise(self) -> NoiseModel | None:
        """The training noise model of the metadata, when it and the native range are there."""
        description = (self.metadata or {}).get("noise")
        if not description or self.spec.low is None or self.spec.high is None:
            return None
        return noise_from_dict(description)

    def _noise_model(self, noise_sigma: float | str) -> NoiseModel | None:
        if noise_sigma != "model":
            return None
        model = self._described_noise()
        if model is None:
            raise ConfigError(f"{self.path}: metadata has no noise model or native range; use 'estimate'")
        if not has_level_map(model):
            raise ConfigError(f"{self.path}: the training noise ({model.kind}) has no per-pixel level; use 'estimate'")
        return model

    def _noise_map(self, windows: np.ndarray, sigma: float | None) -> np.ndarray:
        """The ``noise_sigma`` input for ``(N, C, h, w)`` windows, native units, strength applied."""
        shape = (windows.shape[0], 1, *windows.shape[2:])
        if self.noise_model is None:
            return np.full(shape, np.float32(self.strength * (sigma or 0.0)), np.float32)
        scale = self.spec.high - self.spec.low
        working = np.clip((windows - self.spec.low) / scale, 0.0, 1.0)
        level = self.noise_model.sigma_map(working).mean(axis=1, keepdims=True) * scale
        return (self.strength * level).astype(np.float32)

    # -- settings --------------------------------------------------------------------------------------------

    def settings(self) -> dict[str, Any]:
        """Everything that changes the output (the tile size and threads do not), for output records."""
        return {
            "strength": self.strength,
            "noise_sigma": self.noise_sigma if self.spec.takes_noise_map else None,
            "ensemble": self.ensemble,
        }

    def plan(self, height: int, width: int, step: int | None = None) -> TilePlan:
        """The tile plan for an image of ``height`` x ``width`` pixels; kept edges on the grid of ``step``
        (default: the model's alignment)."""
        return plan_tiles(height, width, tile=self.tile, margin=self.spec.margin, alignment=self.spec.alignment,
                          step=step)

    def batch_size(self, plan: TilePlan) -> int:
        if self.batch:
            return self.batch
        height, width = plan.window_shape
        return max(1, DEFAULT_BATCH_PIXELS // (height * width))

    def check_channels(self, channels: int, path: str | Path | None = None) -> None:
        """Refuse, before running, an image whose channel count differs from the model's (from its metadata or
        its graph's declared input)."""
        if self.spec.channels is not None and channels != self.spec.channels:
            raise InputError(path, f"image has {channels} channel(s), the model {self.path.name} takes "
                                   f"{self.spec.channels}")

    def sigma_for(self, image: np.ndarray | None, sigma: float | None = None) -> float | None:
        """Noise-map level in native units before the strength factor (None for models without a map)."""
        if not self.spec.takes_noise_map:
            return None
        if sigma is not None:
            return float(sigma)
        if self.noise_sigma == "model":
            return None
        if self.noise_sigma == "training":
            return float(self.spec.training_sigma)
        if self.noise_sigma == "estimate":
            return float(np.mean(estimate_sigma(image)))
        return float(self.noise_sigma)

    # -- core ------------------------------------------------------------------------------------------------

    def infer(self, windows: np.ndarray, sigma: float | None = None) -> np.ndarray:
        """Run one batch of windows ``(N, C, h, w)`` float32 native values; returns native float32, with the
        self-ensemble averaged and the strength applied (``sigma``: noise-map level before strength)."""
        total = None
        for member in ENSEMBLE_TRANSFORMS[: self.ensemble]:
            moved = _transform(windows, member)
            feeds = {"image": moved}
            if self.spec.takes_noise_map:
                feeds["noise_sigma"] = self._noise_map(moved, sigma)
            result = _untransform(self.session.run([self.output_name], feeds)[0], member)
            total = result if total is None else total + result
        denoised = total if self.ensemble == 1 else total / np.float32(self.ensemble)
        if not self.spec.takes_noise_map and self.strength != 1.0:
            denoised = self._input_frame(windows) + np.float32(self.strength) * (denoised - self._input_frame(windows))
        return np.asarray(denoised, dtype=np.float32)

    def _input_frame(self, windows: np.ndarray) -> np.ndarray:
        """The channels of ``windows`` the output stands for: all of them, or a multi-frame model's centre frame."""
        if self.spec.stack_frames == 1:
            return windows
        channels = windows.shape[1] // self.spec.stack_frames
        first = (self.spec.stack_frames // 2) * channels
        return windows[:, first:first + channels]

    def kept_tiles(
        self,
        plan: TilePlan,
        read_rows: Callable[[int, int], np.ndarray],
        sigma: float | None = None,
        progress: Callable[[int], Any] | None = None,
    ) -> Iterator[tuple[Tile, np.ndarray]]:
        """Yield ``(tile, kept output (h, w, C) float32 native)`` in row-major order.

        ``read_rows(y0, y1)`` returns rows ``y0:y1`` of the padded image (all ``plan.padded_width`` columns),
        native values, ``(rows, padded_width, C)``; it is called once per row of tiles, so a reader can stream.
        ``progress(n)`` is called after each batch with the number of tiles done.
        """

        def windows() -> Iterator[tuple[Tile, np.ndarray]]:
            band_rows, band = None, None
            for tile in plan.tiles:
                y0, y1, x0, x1 = tile.window
                if band_rows != (y0, y1):
                    band_rows, band = (y0, y1), read_rows(y0, y1)
                yield tile, band[:, x0:x1]

        for chunk in batched(windows(), self.batch_size(plan)):
            stack = np.stack([window for _, window in chunk]).astype(np.float32).transpose(0, 3, 1, 2)
            outputs = self.infer(np.ascontiguousarray(stack), sigma)
            for (tile, _), output in zip(chunk, outputs):
                rows, cols = tile.keep_in_window()
                yield tile, output[:, rows, cols].transpose(1, 2, 0)
            if progress is not None:
                progress(len(chunk))

    def run(
        self,
        image: np.ndarray,
        *,
        sigma: float | None = None,
        as_float: bool = False,
        progress: Callable[[int], Any] | None = None,
    ) -> np.ndarray:
        """Denoise one native image.

        Parameters
        ----------
        image : ndarray
            ``(H, W, C)`` (or ``(H, W)`` for one channel) in its native dtype and range.
        sigma : float, optional
            Noise-map models: the noise standard deviation in native units for this image (overrides the
            OnnxDenoiser's ``noise_sigma``; the strength still multiplies it).
        as_float : bool
            Return float32 native values, unclipped, instead of the input's dtype.

        Returns
        -------
        ndarray
            Same shape as ``image``; its dtype (clipped to the native range and rounded) unless ``as_float``.
        """
        if self.spec.stack_frames > 1:
            raise InputError(self.path, f"this model reads {self.spec.stack_frames} consecutive frames per output "
                             "frame; give it a stack (grainwright.inference.runtime.stack_window.denoise_stack)")
        array = np.asarray(image)
        flat = array.ndim == 2
        if flat:
            array = array[:, :, None]
        if array.ndim != 3 or array.shape[0] < 1 or array.shape[1] < 1:
            raise InputError(None, f"expected an (H, W, C) image, got shape {np.shape(image)}")
        self.check_channels(array.shape[2])
        if array.dtype.kind == "f" and not np.all(np.isfinite(array)):
            raise InputError(None, "image has NaN or infinite pixels")
        plan = self.plan(*array.shape[:2])
        padded = pad_to_alignment(array, self.spec.alignment)
        level = self.sigma_for(array, sigma)
        result = np.empty(array.shape, np.float32)
        for tile, kept in self.kept_tiles(plan, lambda y0, y1: padded[y0:y1], level, progress):
            y0, y1, x0, x1 = tile.keep
            result[y0:y1, x0:x1] = kept
        if not as_float:
            result = to_dtype(result, array.dtype, self.spec)
        return result[:, :, 0] if flat else result

    def run_whole(self, image: np.ndarray, *, sigma: float | None = None) -> np.ndarray:
        """Reference: the whole padded image in one call, no tiles (float32 native, unclipped)."""
        array = np.asarray(image)
        padded = pad_to_alignment(array, self.spec.alignment)
        batch = np.ascontiguousarray(padded.astype(np.float32).transpose(2, 0, 1)[None])
        output = self.infer(batch, self.sigma_for(array, sigma))[0].transpose(1, 2, 0)
        return output[: array.shape[0], : array.shape[1]]
