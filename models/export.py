"""Export a checkpoint to one self-contained ONNX file: native values in, native values out.

The graph holds the whole chain: normalisation to the working range, the variance-stabilising transform, the
network (batch norm folded), the inverse transform and the mapping back to native values. A program with nothing
but ONNX Runtime and the tiling rule from the metadata gets the same result as grainwright's own runtime.

Interface (opset 17, dynamic batch, height and width):

- input ``image``: float32 ``N x C x H x W``, native pixel values (e.g. 0..4095 for 12-bit data);
- input ``noise_sigma`` (``residual-noisemap`` only): float32 ``N x 1 x H x W``, noise standard deviation per
  pixel in native units (the graph converts it, see :mod:`grainwright.models.working_range`);
- output ``denoised``: float32 ``N x C x H x W``, native values, neither clipped nor rounded.

Any H and W: the graph pads the image (and the noise map) at the bottom and right by mirror reflection to
multiples of the model's alignment and crops the output back, exactly as grainwright's runtime pads before
tiling (for which the declared ``alignment`` stays in the metadata: aligned tiles need no padding inside). One JSON
document under the ``metadata_props`` key ``grainwright`` describes the model (:func:`build_metadata`). Every export checks ONNX Runtime against torch
(numpy normalisation + torch network) and writes nothing when they differ by more than ``PARITY_TOLERANCE`` in
the domain the network computes in (:func:`working_domain_difference`).
"""
from __future__ import annotations

import datetime
import io
import json
import warnings
from dataclasses import dataclass, field
from pathlib import Path, PurePath
from typing import Any, Callable

import numpy as np
import onnx
import onnxruntime as ort
import torch
from torch import nn

from grainwright.inference import __version__
from grainwright.inference.common.atomic import write_bytes_atomic
from grainwright.inference.common.errors import (
    ConfigError,
    GrainwrightError,
    InputError,
)
from grainwright.inference.images.alignment import recorded_revision
from grainwright.inference.images.crops import centre_crop
from grainwright.inference.images.normalization import Normalization
from grainwright.inference.images.transforms import anscombe_forward
from grainwright.inference.runtime.modelinfo import (
    METADATA_FORMAT,
    METADATA_KEY,
    metadata_version,
    noise_map_entry,
)
from grainwright.models.base import DenoisingNetwork
from grainwright.models.checkpoint import (
    load_checkpoint,
    model_from_checkpoint,
    resolve_checkpoint,
)
from grainwright.models.onnx_io import (
    CalibrationImage,
    pad_to_alignment,
    read_calibration,
    run_session,
    session_for,
)
from grainwright.models.working_range import WorkingRange

OPSET = 17
# Largest ONNX Runtime vs torch difference accepted, in working units of the domain the network computes in
# (fractions of the native range when there is no transform; see working_domain_difference).
PARITY_TOLERANCE = 1e-4
PARITY_SHAPE = (123, 77)  # odd on purpose: the padding to the alignment inside the graph is checked too
CALIBRATION_CROP = 256
CAUTION = (
    "Denoising can remove exactly the detail that matters. On medical or safety-critical images the output is "
    "an aid for viewing and screening, not a substitute for the original or for qualified review; follow local "
    "regulations and licensed practice."
)


class ExportGraph(nn.Module):
    """Native values -> aligned size -> working range -> network -> native values -> original size, as one
    module to trace."""

    def __init__(self, model: DenoisingNetwork, working_range: WorkingRange):
        super().__init__()
        self.model = model
        self.working_range = working_range

    def forward(self, image: torch.Tensor, noise_sigma: torch.Tensor | None = None) -> torch.Tensor:
        height, width = image.shape[2], image.shape[3]
        image = pad_reflect_to(image, self.model.alignment)
        working = self.working_range.to_working(image)
        sigma = None
        if self.model.takes_noise_map:
            sigma = self.working_range.noise_sigma_to_working(pad_reflect_to(noise_sigma, self.model.alignment),
                                                              image)
        return self.working_range.from_working_float(self.model(working, sigma))[:, :, :height, :width]


def pad_reflect_to(batch: torch.Tensor, alignment: int) -> torch.Tensor:
    """Pad ``(N, C, H, W)`` at the bottom and right by mirror reflection (edge pixel not repeated, numpy's
    ``'reflect'``) to multiples of ``alignment``; traced with the sizes as graph values, so the exported graph
    pads whatever size it is given. Sizes must exceed the padding (at least ``alignment`` pixels)."""
    if alignment == 1:
        return batch
    extra_rows = (alignment - batch.shape[2] % alignment) % alignment
    extra_cols = (alignment - batch.shape[3] % alignment) % alignment
    return nn.functional.pad(batch, [0, extra_cols, 0, extra_rows], mode="reflect")


def export_graph(model: DenoisingNetwork, normalization: Normalization, opset: int = OPSET) -> onnx.ModelProto:
    """Trace ``model`` (eval mode, batch norm folded) with its normalisation into an ONNX model."""
    graph = ExportGraph(model.for_export().eval(), WorkingRange(normalization)).eval()
    side = 2 * model.alignment
    # Tracing records operations, not values: a constant mid-range example leaves the caller's random state alone.
    example = [torch.full((1, model.input_channels, side, side), normalization.low + 0.5 * normalization.full_range)]
    names, axes = ["image"], {"image": {0: "N", 2: "H", 3: "W"}, "denoised": {0: "N", 2: "H", 3: "W"}}
    if model.takes_noise_map:
        example.append(torch.full((1, 1, side, side), 0.01 * normalization.full_range))
        names.append("noise_sigma")
        axes["noise_sigma"] = {0: "N", 2: "H", 3: "W"}
    buffer = io.BytesIO()
    with warnings.catch_warnings():
        # The TorchScript-based exporter is deprecated in favour of one that needs onnxscript, which the training
        # install does not carry; this one covers every operator we use.
        warnings.simplefilter("ignore")
        torch.onnx.export(
            graph, tuple(example), buffer, input_names=names, output_names=["denoised"], dynamic_axes=axes,
            opset_version=opset, do_constant_folding=True, dynamo=False,
        )
    proto = onnx.load_from_string(buffer.getvalue())
    proto.producer_name, proto.producer_version = "grainwright", __version__
    proto.doc_string = f"grainwright {model.name} denoiser: native float32 image in, denoised native float32 out"
    return proto


def reference_output(model: DenoisingNetwork, normalization: Normalization, image: np.ndarray,
                     noise_sigma: np.ndarray | None = None) -> np.ndarray:
    """What the export must reproduce: numpy padding to the alignment (the runtime's), numpy ``to_working``, the
    torch network, numpy ``from_working_float``, cropped back to the image's size."""
    height, width = image.shape[-2:]
    image = pad_to_alignment(image, model.alignment)
    working = torch.from_numpy(normalization.to_working(image))
    sigma = None
    if model.takes_noise_map:
        sigma = WorkingRange(normalization).noise_sigma_to_working(
            torch.from_numpy(pad_to_alignment(noise_sigma, model.alignment)), torch.from_numpy(image))
    with torch.no_grad():
        output = model.eval()(working, sigma).numpy()
    return normalization.from_working_float(output)[..., :height, :width]


def parity_difference(session: ort.InferenceSession, model: DenoisingNetwork, normalization: Normalization,
                      image: np.ndarray, noise_sigma: np.ndarray | None) -> dict[str, float]:
    """Largest |ONNX Runtime - torch| over ``image``: ``working`` in the domain the network computes in (what the
    check holds to ``PARITY_TOLERANCE``, see :func:`working_domain_difference`) and ``native`` in fractions of the
    native range (for the record)."""
    expected = reference_output(model, normalization, image, noise_sigma)
    actual = run_session(session, image, noise_sigma)
    if actual.shape != expected.shape:
        raise GrainwrightError(f"exported graph returned shape {actual.shape}, expected {expected.shape}")
    native = float(np.max(np.abs(actual.astype(np.float64) - expected)) / normalization.full_range)
    return {"working": working_domain_difference(normalization, actual, expected), "native": native}


def working_domain_difference(normalization: Normalization, actual: np.ndarray, expected: np.ndarray) -> float:
    """Largest difference of two native outputs in working units of the transform domain, where the network
    computes: both mapped by the forward transform in float64 (the identity, the generalized Anscombe transform,
    or ``log(x + epsilon)``), divided by the transform's ``scale``.

    Why not native units: the log domain's inverse, ``exp``, multiplies a difference by the output's own size, so
    the float32 rounding of the two network runs (about 1e-6 of the working range) becomes a large native
    difference wherever the output lies far above the range, as the random parity image with its random noise map
    drives it (125 times the range, 2.4e-4 of it, for a gamma-speckle model whose working-domain difference was
    5e-7). In the working domain the yardstick is the same for every transform. A graph whose transform or
    inverse disagrees with numpy's still shows: for the log transform the map is the exact inverse of the graph's
    ``exp`` (its bias and offset are constants and cancel in the difference), for the Anscombe transform the
    forward transform has the slope of the exact unbiased inverse's inverse to first order. Without a transform
    this is the native difference in fractions of the range.
    """
    x_actual = (actual.astype(np.float64) - normalization.low) / normalization.full_range
    x_expected = (expected.astype(np.float64) - normalization.low) / normalization.full_range
    transform = normalization.transform
    if not transform:
        return float(np.max(np.abs(x_actual - x_expected)))
    if transform["kind"] == "anscombe":
        def forward(x: np.ndarray) -> np.ndarray:
            return anscombe_forward(np.maximum(x, 0.0), transform["gain"], transform["read"])
    else:
        def forward(x: np.ndarray) -> np.ndarray:  # exp() - epsilon never reaches -epsilon unless it underflows
            return np.log(np.maximum(x + transform["epsilon"], np.finfo(np.float64).tiny))
    return float(np.max(np.abs(forward(x_actual) - forward(x_expected))) / transform["scale"])


def typical_sigma_native(payload: dict[str, Any], normalization: Normalization) -> float:
    """Noise level for parity runs and calibration of noise-map models: the training level, else 2% of range."""
    training = training_noise(payload, normalization) or {}
    if training.get("sigma_native"):
        return float(training["sigma_native"])
    return 0.02 * normalization.full_range


def training_noise(payload: dict[str, Any], normalization: Normalization) -> dict[str, Any] | None:
    """The noise level seen in training, native units: the trainer's record, else from a Gaussian noise model."""
    if payload.get("training_noise"):
        return dict(payload["training_noise"])
    noise = payload.get("noise") or {}
    if noise.get("kind") == "gaussian" and noise.get("sigma") is not None:
        return {"sigma_native": float(noise["sigma"]) * normalization.full_range, "source": "noise model"}
    return None


def tiling_rule(receptive_field: int, alignment: int, margin: int) -> str:
    """The tiling rule in words, with this model's numbers (the runtime's rule, ``grainwright.inference.runtime.tiling``)."""
    return (
        f"1. Pad the image at the bottom and right by mirror reflection (numpy.pad mode 'reflect') to multiples "
        f"of the alignment, {alignment} px; a whole-image run pads the same way. "
        f"2. Cut the padded image into kept squares whose origins lie on the {alignment}-px grid. "
        f"3. Run each kept square with a margin of {margin} px on every side (at least the receptive-field "
        f"radius, {(receptive_field - 1) // 2} px, and a multiple of the alignment); never extend a window beyond "
        f"the padded image, shift it inwards at the borders instead. "
        f"4. Keep only each window's kept square, then crop the padding. The result equals a whole-image run."
    )


def shareable_summary(summary: dict[str, Any] | None, record_data_path: bool = False) -> dict[str, Any] | None:
    """The training summary as it may travel with a model: the training data folder by its base name only (the
    ``data_fingerprint`` identifies the files), unless ``record_data_path`` asks for the full path as trained."""
    if summary is None:
        return None
    summary = dict(summary)
    if summary.get("data_folder") and not record_data_path:
        summary["data_folder"] = PurePath(str(summary["data_folder"])).name
    started = summary.get("started_from")
    if isinstance(started, dict) and started.get("path") and not record_data_path:
        summary["started_from"] = dict(started, path=PurePath(str(started["path"])).name)
    return summary


def stack_description(model: DenoisingNetwork, payload: dict[str, Any]) -> dict[str, Any] | None:
    """What the runtime needs to slide a multi-frame model along a stack (None for single-frame models)."""
    if model.stack_frames == 1:
        return None
    summary = payload.get("training_summary") or {}
    entry = {
        "frames": model.stack_frames,
        # The axis the training stacks ran along (Z slices of a volume, T time points of a sequence, or I when
        # the files did not say); the runtime slides along the one frame axis of each file.
        "axis": summary.get("stack_axis", "I"),
        "channel_order": "frame-major",
        "ends": "reflect",
        "stack_receptive_field": model.stack_frames,
        # How the neighbours are aligned to the centre frame before the model sees them (the runtime does the same).
        "align_neighbours": summary.get("align_neighbours", "none"),
    }
    if entry["align_neighbours"] != "none":
        # Which computation of the alignment the model was trained on; a checkpoint from before the revision was
        # recorded was trained on revision 1, and its file says so (the runtime then refuses it).
        entry["align_revision"] = recorded_revision(summary)
    return entry


def build_metadata(payload: dict[str, Any], model: DenoisingNetwork, normalization: Normalization,
                   parity: dict[str, Any], source: Path, record_data_path: bool = False) -> dict[str, Any]:
    """The JSON document stored under ``metadata_props['grainwright']`` (keys listed in docs/onnx-format.md).

    The training data folder appears by its base name, or as the full path with ``record_data_path``.
    """
    figures = model.describe()
    stack = stack_description(model, payload)
    inputs = {"image": "float32 N x C x H x W, native pixel values; any H and W of at least the alignment (the graph "
                       "pads to multiples of the alignment by reflection and crops back; aligned sizes avoid it)"}
    if model.takes_noise_map:
        inputs["noise_sigma"] = (
            "float32 N x 1 x H x W, noise standard deviation per pixel in native units; scale it to change the "
            "strength. The graph converts it to the working domain by the transform's slope at each pixel, so for "
            "Poisson-Gaussian noise (Anscombe transform) give sigma(x) = (high - low) * sqrt(gain * (x - low) / "
            "(high - low) + read**2) with gain and read from normalization.transform, and for gamma speckle (log "
            "transform with looks L) give sigma(x) = (x - low) / sqrt(L)"
        )
    if model.stack_frames > 1:
        inputs["image"] = (f"float32 N x ({model.stack_frames} * C) x H x W, native pixel values of "
                           f"{model.stack_frames} consecutive frames, frame-major (channel k * C + c is frame k, "
                           "channel c); H and W multiples of the alignment")
    # How the runtime makes the noise_sigma input, stated in the file so that no reader has to rederive it.
    noise_map = noise_map_entry({"takes_noise_map": model.takes_noise_map, "normalization": normalization.to_dict(),
                                 "noise": payload.get("noise"), "scheme": payload.get("scheme")})
    return {
        "format": METADATA_FORMAT,
        # Version 2 adds the "stack" key, version 3 neighbours aligned by optical flow, version 4 the alignment's
        # revision 2; a file is written at the lowest version that describes it, so that older runtimes read what
        # they can run and refuse the rest.
        "format_version": metadata_version(stack),
        "precision": "float32",
        "architecture": {"name": model.name, "hyper": dict(model.hyper)},
        "parameters": figures["parameters"],
        "macs_per_pixel": figures["macs_per_pixel"],
        "receptive_field": figures["receptive_field"],
        "alignment": figures["alignment"],
        "tile_margin": figures["tile_margin"],
        "tiling_rule": tiling_rule(figures["receptive_field"], figures["alignment"], figures["tile_margin"]),
        "channels": model.channels,
        "takes_noise_map": model.takes_noise_map,
        "stack": stack,
        "inputs": inputs,
        "noise_map": noise_map,
        "outputs": {"denoised": "float32 N x C x H x W, native values, not clipped or rounded"},
        "normalization": normalization.to_dict(),
        "noise": payload.get("noise"),
        "training_noise": training_noise(payload, normalization),
        "scheme": payload.get("scheme"),
        "data_fingerprint": payload.get("data_fingerprint"),
        "training_summary": shareable_summary(payload.get("training_summary"), record_data_path),
        # Where training started (starting model + sha256, random weights, an earlier run) and which end was kept.
        "started_from": (shareable_summary(payload.get("training_summary"), record_data_path) or {}).get(
            "started_from"),
        "selection": (payload.get("training_summary") or {}).get("selection"),
        "source_checkpoint": {"file": source.name, "created": payload.get("created"),
                              "tool_version": payload.get("tool_version")},
        "opset": OPSET,
        "parity": parity,
        "tool_version": __version__,
        "created": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
        "caution": CAUTION,
    }


def attach_metadata(proto: onnx.ModelProto, metadata: dict[str, Any]) -> onnx.ModelProto:
    """Store ``metadata`` as JSON under the single ``grainwright`` key (replacing any earlier one)."""
    kept = [entry for entry in proto.metadata_props if entry.key != METADATA_KEY]
    del proto.metadata_props[:]
    proto.metadata_props.extend(kept)
    proto.metadata_props.add(key=METADATA_KEY, value=json.dumps(metadata, default=str, sort_keys=False))
    return proto


def write_model(proto: onnx.ModelProto, path: Path, overwrite: bool = False) -> Path:
    """Check the model with ``onnx.checker`` and write it atomically (temporary name, then rename)."""
    onnx.checker.check_model(proto, full_check=True)
    if path.exists() and not overwrite:
        raise InputError(path, "already exists; pass --overwrite to replace it")
    path.parent.mkdir(parents=True, exist_ok=True)
    return write_bytes_atomic(path, proto.SerializeToString(), durable=True)


@dataclass
class ExportResult:
    path: Path
    metadata: dict[str, Any]
    int8_path: Path | None = None
    int8_report: dict[str, Any] | None = None
    messages: list[str] = field(default_factory=list)


def int8_path_for(path: Path) -> Path:
    """``model.onnx`` -> ``model.int8.onnx``."""
    return path.with_name(f"{path.stem}.int8{path.suffix or '.onnx'}")


def _check_outputs(checkpoint: Path, output: Path, int8: bool, calibration: str | Path | None,
                   overwrite: bool) -> None:
    """Refuse, before any work, an output that is the checkpoint, INT8 without calibration images, or files that
    exist (unless ``overwrite``)."""
    if output.resolve() == checkpoint.resolve():
        raise InputError(output, "is the checkpoint itself; choose another output name")
    if int8 and calibration is None:
        raise ConfigError("--int8 needs --calibration DIR: static quantisation is calibrated on your own images")
    for target in [output] + ([int8_path_for(output)] if int8 else []):
        if target.exists() and not overwrite:
            raise InputError(target, "already exists; pass --overwrite to replace it")


def _load_for_export(checkpoint: Path) -> tuple[dict[str, Any], Normalization, Any]:
    """The checkpoint's payload, its normalisation (checked against the network's channels) and the network."""
    payload = load_checkpoint(checkpoint)
    try:
        normalization = Normalization.from_dict(payload["normalization"])
    except GrainwrightError as error:
        raise InputError(checkpoint, f"bad normalisation description: {error}") from None
    if normalization.channels != payload["channels"]:
        raise InputError(checkpoint, f"normalisation is for {normalization.channels} channel(s), "
                                     f"the network for {payload['channels']}")
    return payload, normalization, model_from_checkpoint(payload, checkpoint)


def _noise_maps(model: Any, sigma_level: float,
                rng: np.random.Generator) -> Callable[[np.ndarray, bool], np.ndarray | None]:
    """``noise_map_for(batch, random)``: the noise-level input for a ``(N, C, H, W)`` batch (None for a model
    without one): the typical level everywhere, or with ``random`` a level varying over the image (0.25 to 4 times
    the typical one), as signal-dependent noise does."""
    def noise_map_for(batch: np.ndarray, random: bool) -> np.ndarray | None:
        if not model.takes_noise_map:
            return None
        shape = (batch.shape[0], 1, *batch.shape[2:])
        if random:
            return rng.uniform(0.25, 4.0, shape).astype(np.float32) * np.float32(sigma_level)
        return np.full(shape, sigma_level, np.float32)

    return noise_map_for


def _parity_checks(session: Any, model: Any, normalization: Normalization, images: list[CalibrationImage],
                   noise_map_for: Callable[[np.ndarray, bool], np.ndarray | None],
                   rng: np.random.Generator) -> dict[str, Any]:
    """ONNX Runtime against torch on a random image of odd size (the graph pads to the alignment and crops back)
    and on the centre crop of the first calibration image, as the largest absolute difference in the working
    domain (checked) and in fractions of the native range (recorded)."""
    random_image = rng.uniform(normalization.low, normalization.high, (1, model.input_channels, *PARITY_SHAPE))
    random_image = random_image.astype(np.float32)
    parity: dict[str, Any] = {
        "tolerance": PARITY_TOLERANCE,
        "units": "max_abs_diff: working units of the domain the network computes in (after the variance-stabilising "
                 "transform, if any; without one, fractions of the native range); max_abs_diff_native: fractions "
                 "of the native range (high - low)",
        "random": _parity_entry(session, model, normalization, random_image, noise_map_for(random_image, random=True)),
        "calibration": None,
    }
    if images:
        crop = centre_crop(images[0].frame, CALIBRATION_CROP, channels_first=True)[None]
        crop = np.concatenate([crop] * model.stack_frames, axis=1)  # a multi-frame model: a still window
        entry = _parity_entry(session, model, normalization, crop, noise_map_for(crop, random=False))
        parity["calibration"] = {"file": images[0].path.name, **entry}
    return parity


def _parity_entry(session: Any, model: Any, normalization: Normalization, image: np.ndarray,
                  noise_sigma: np.ndarray | None) -> dict[str, Any]:
    """One parity record: the input's shape and both differences of :func:`parity_difference`."""
    difference = parity_difference(session, model, normalization, image, noise_sigma)
    return {"shape": list(image.shape), "max_abs_diff": difference["working"],
            "max_abs_diff_native": difference["native"]}


def _export_int8(proto: Any, model: Any, normalization: Normalization, images: list[CalibrationImage],
                 noise_map_for: Callable[[np.ndarray, bool], np.ndarray | None], metadata: dict[str, Any],
                 result: ExportResult, *, min_psnr: float, overwrite: bool, threads: int, seed: int) -> str:
    """Quantise, and write the INT8 model beside the FP32 one when it passes the PSNR gate; returns the message."""
    from grainwright.models.quantize import quantize_model

    report, int8_proto = quantize_model(proto, model, normalization, images, noise_map_for,
                                        min_psnr=min_psnr, threads=threads, seed=seed)
    result.int8_report = report
    if not report["passed"]:
        return (f"INT8 model not written: {report['psnr_vs_fp32_db']:.1f} dB against the FP32 output on "
                f"{report['held_out_patches']} held-out patches, below the {min_psnr:g} dB threshold")
    int8_metadata = {**metadata, "precision": "int8", "int8": report}
    result.int8_path = write_model(attach_metadata(int8_proto, int8_metadata), int8_path_for(result.path),
                                   overwrite=overwrite)
    return (f"wrote {result.int8_path} (INT8 vs FP32 on {report['held_out_patches']} held-out patches: "
            f"{report['psnr_vs_fp32_db']:.1f} dB, {report['speed_ratio_vs_fp32']:.2f}x the FP32 speed)")


def export_checkpoint(
    source: str | Path,
    output: str | Path,
    *,
    calibration: str | Path | None = None,
    int8: bool = False,
    min_int8_psnr: float = 40.0,
    overwrite: bool = False,
    record_data_path: bool = False,
    threads: int = 2,
    seed: int = 0,
    log: Callable[[str], None] = lambda message: None,
) -> ExportResult:
    """Export a checkpoint (or a run folder's best checkpoint) to ONNX, with parity checks and metadata.

    Parameters
    ----------
    source : path
        A checkpoint file or a run folder (its ``checkpoints/best.pt`` is exported).
    output : path
        The FP32 ONNX file to write. With ``int8``, the INT8 file goes beside it as ``NAME.int8.onnx``.
    calibration : path, optional
        Folder of the user's images (same dtype and channels as in training): a parity crop, and with ``int8``
        the calibration and held-out patches.
    int8 : bool
        Also write a statically quantised INT8 model (convolutions only), if its PSNR against the FP32 output
        on held-out patches reaches ``min_int8_psnr`` dB.
    overwrite : bool
        Replace existing output files.
    record_data_path : bool
        Record the training data folder's full path in the metadata; by default only its base name travels
        with the model (beside the fingerprint of the training files), so no workstation path leaves the site.

    Returns
    -------
    ExportResult
        Written paths, the FP32 metadata and the INT8 report (``int8_report["passed"]`` tells the gate's verdict).

    Raises
    ------
    GrainwrightError
        Bad input, or an ONNX Runtime vs torch difference above ``PARITY_TOLERANCE`` (nothing written then).
    """
    checkpoint = resolve_checkpoint(source)
    output = Path(output)
    _check_outputs(checkpoint, output, int8, calibration, overwrite)
    payload, normalization, model = _load_for_export(checkpoint)
    if int8 and model.stack_frames > 1:
        raise ConfigError("--int8 is not available for multi-frame (stack) models yet; export them in float32")
    images = read_calibration(calibration, normalization) if calibration is not None else []

    proto = export_graph(model, normalization)
    session = session_for(proto, threads)
    rng = np.random.default_rng(seed)
    noise_map_for = _noise_maps(model, typical_sigma_native(payload, normalization), rng)
    parity = _parity_checks(session, model, normalization, images, noise_map_for, rng)
    worst = max(entry["max_abs_diff"] for entry in (parity["random"], parity["calibration"]) if entry)
    if not worst <= PARITY_TOLERANCE:
        raise GrainwrightError(
            f"{checkpoint}: parity check failed, ONNX Runtime and torch differ by {worst:.3g} of the working range "
            f"(limit {PARITY_TOLERANCE:g}); nothing was written"
        )

    metadata = build_metadata(payload, model, normalization, parity, checkpoint, record_data_path)
    write_model(attach_metadata(proto, metadata), output, overwrite=overwrite)
    result = ExportResult(output, metadata)
    result.messages.append(f"wrote {output} (parity {worst:.2g} of the working range, limit {PARITY_TOLERANCE:g})")
    log(result.messages[-1])
    if int8:
        result.messages.append(_export_int8(proto, model, normalization, images, noise_map_for, metadata, result,
                                            min_psnr=min_int8_psnr, overwrite=overwrite, threads=threads,
                                            seed=seed))
        log(result.messages[-1])
    return result
