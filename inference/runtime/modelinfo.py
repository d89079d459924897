"""Read and show the description an exported grainwright model carries (torch-free).

Every exported ONNX file holds one JSON document under the ``metadata_props`` key ``grainwright``, with
``format = "grainwright-model"`` and a ``format_version``. Its keys are listed in docs/onnx-format.md
(written by ``grainwright.models.export.build_metadata``).
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import onnxruntime as ort

from grainwright.inference.common.errors import InputError
from grainwright.inference.images.alignment import recorded_revision
from grainwright.inference.noise.models import NoiseModel, noise_from_dict

METADATA_KEY = "grainwright"
METADATA_FORMAT = "grainwright-model"
# Version 2 added the "stack" key of multi-frame models (K frames in, the centre frame out), version 3 its
# "align_neighbours" value "optical-flow" (an older runtime would feed such a model unaligned windows), version 4
# its "align_revision" (2: the cheaper flow of grainwright.inference.images.alignment; a version-3 file was aligned
# by revision 1, and a runtime of version 3 would align a version-4 model's windows the old way). Revision 3 (the
# flow reused between output frames) stays at version 4: every version-4 runtime checks the revision and refuses
# another one by itself. Version 5 added the "align_neighbours" value "dominant-shifts" (the whole-pixel shifts of
# grainwright.inference.images.shift_alignment). Each file is
# written at the lowest version that describes it, so older runtimes keep reading what they can run and refuse
# only the rest.
METADATA_VERSION = 5
# How a noise-map model's "noise_sigma" input is made at run time (the "noise_map" entry's "source"): the training
# noise model's level at every pixel, or one level per image estimated from the image.
NOISE_MAP_SOURCES = ("noise-model", "estimate")
NOISE_MAP_RULES = {
    "noise-model": "per pixel: the level of the 'noise' model (working units) at the noisy pixel's normalised value "
                   "x = (value - low) / (high - low), clipped to [0, 1], times (high - low); averaged over the "
                   "channels",
    "estimate": "one level per image, native units: the median absolute deviation of the finest diagonal wavelet "
                "coefficients over 0.6745 (Donoho and Johnstone 1994), the mean over the channels",
}


def _revision(stack: dict[str, Any]) -> str:
    """`` (revision R)`` for a model with aligned neighbours (files of format 3 carry none: revision 1)."""
    revision = recorded_revision(stack)
    return "" if revision is None else f" (revision {revision})"


def metadata_version(stack: dict[str, Any] | None) -> int:
    """The format version a model with the ``stack`` entry (None: single-frame) is written at."""
    if not stack:
        return 1
    revision = recorded_revision(stack)
    if revision is None:
        return 2
    if stack["align_neighbours"] == "dominant-shifts":
        return 5
    return 4 if revision >= 2 else 3


def has_level_map(model: NoiseModel) -> bool:
    """Whether the noise model gives a per-pixel level (Gaussian, Poisson-Gaussian, speckle... do)."""
    return model.sigma_map(np.zeros((1, 1, 1), np.float32)) is not None


def _signal_dependent(model: NoiseModel) -> bool:
    dark, bright = (model.sigma_map(np.full((1, 1, 1), value, np.float32)) for value in (0.1, 0.9))
    return not np.allclose(dark, bright)


def derived_noise_map_source(metadata: dict[str, Any]) -> str | None:
    """Where a noise-map model's level input comes from, by the rule the exporter applies (files written before the
    ``noise_map`` entry are read by it too); None for a model without a noise-map input.

    ``"noise-model"`` for a model working in a variance-stabilised domain whose training noise model has a
    per-pixel level (Poisson-Gaussian noise through the Anscombe transform, gamma speckle through the log: there the
    transform, not the image, sets the level the network sees), and for a supervised model of signal-dependent
    noise, which trained on that level pixel by pixel; ``"estimate"`` otherwise. One level estimated on a whole
    image misstates signal-dependent noise: dark regions pull it down, and the graph then converts that one native
    level at every pixel's own slope, under-telling bright regions."""
    if not metadata.get("takes_noise_map"):
        return None
    normalization = metadata.get("normalization") or {}
    description = metadata.get("noise")
    if not description or normalization.get("low") is None or normalization.get("high") is None:
        return "estimate"
    model = noise_from_dict(description)
    if not has_level_map(model):
        return "estimate"
    if normalization.get("transform") or (metadata.get("scheme") == "supervised" and _signal_dependent(model)):
        return "noise-model"
    return "estimate"


def noise_map_entry(metadata: dict[str, Any]) -> dict[str, str] | None:
    """The ``noise_map`` entry an exported file carries: ``source`` (one of ``NOISE_MAP_SOURCES``) and ``rule``,
    how to compute the ``noise_sigma`` input in words (for programs in other languages); None without the input."""
    source = derived_noise_map_source(metadata)
    return None if source is None else {"source": source, "rule": NOISE_MAP_RULES[source]}


def noise_map_source(metadata: dict[str, Any], path: str | Path | None = None) -> str | None:
    """The noise-map source a model's metadata states (``noise_map.source``), or for files written before it the
    exporter's rule (:func:`derived_noise_map_source`). A source this grainwright does not know is refused."""
    entry = metadata.get("noise_map")
    if not entry:
        return derived_noise_map_source(metadata)
    source = entry.get("source") if isinstance(entry, dict) else None
    if source not in NOISE_MAP_SOURCES:
        raise InputError(path, f"unknown noise map source {source!r} in the model description (this grainwright "
                               f"knows {', '.join(NOISE_MAP_SOURCES)}); update grainwright")
    return source


def _session(path: Path) -> ort.InferenceSession:
    if not path.exists():
        raise InputError(path, "no such model file")
    if path.is_dir():
        raise InputError(path, "is a folder, not an ONNX model file")
    options = ort.SessionOptions()
    options.intra_op_num_threads = 1
    options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL  # reading, not running
    try:
        return ort.InferenceSession(str(path), options, providers=["CPUExecutionProvider"])
    except Exception as error:  # ONNX Runtime raises several types for files it cannot parse
        first = str(error).strip().splitlines()[0] if str(error).strip() else type(error).__name__
        raise InputError(path, f"not a readable ONNX model ({first})") from None


def check_metadata(metadata: Any, path: str | Path | None = None) -> dict[str, Any]:
    """Validate the document's format name and version; return it."""
    if not isinstance(metadata, dict) or metadata.get("format") != METADATA_FORMAT:
        raise InputError(path, f"the '{METADATA_KEY}' metadata is not a grainwright model description")
    version = metadata.get("format_version")
    if not isinstance(version, int) or version < 1:
        raise InputError(path, f"bad model description format version {version!r}")
    if version > METADATA_VERSION:
        raise InputError(path, f"model description format version {version} is newer than this grainwright reads "
                               f"({METADATA_VERSION}); update grainwright")
    return metadata


def read_model_metadata(path: str | Path) -> dict[str, Any]:
    """The grainwright JSON document of an exported model.

    Raises
    ------
    InputError
        Missing or unreadable file, no grainwright metadata (e.g. a model from elsewhere), invalid JSON, or a
        format version newer than this grainwright reads.
    """
    path = Path(path)
    text = _session(path).get_modelmeta().custom_metadata_map.get(METADATA_KEY)
    if text is None:
        raise InputError(path, f"has no '{METADATA_KEY}' metadata: export it with 'grainwright export', or give "
                               "the receptive field, alignment and normalisation by hand")
    try:
        metadata = json.loads(text)
    except json.JSONDecodeError as error:
        raise InputError(path, f"the '{METADATA_KEY}' metadata is not valid JSON ({error})") from None
    return check_metadata(metadata, path)


def model_io(path: str | Path) -> dict[str, list[tuple[str, str, list[Any]]]]:
    """Inputs and outputs of the graph as ``(name, type, shape)``; dynamic axes appear by name."""
    session = _session(Path(path))
    return {
        "inputs": [(i.name, i.type, list(i.shape)) for i in session.get_inputs()],
        "outputs": [(o.name, o.type, list(o.shape)) for o in session.get_outputs()],
    }


def _figure(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, dict):
        return ", ".join(f"{k}={_figure(v)}" for k, v in value.items())
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_figure(v) for v in value) + "]"
    return "-" if value is None else str(value)


def _decisions(summary: dict[str, Any]) -> str:
    """How training decided the noise kind and the transform, from the training summary, in words."""
    if "transform_decided_by" not in summary:
        return "- (not recorded by this model's trainer)"
    noise = summary.get("noise_kind")
    noise_text = f"noise {noise} (from the {summary.get('noise_decided_by')})" if noise else "no noise model"
    text = f"{noise_text}; transform {summary.get('transform')} (decided by the {summary['transform_decided_by']})"
    if summary.get("noise_found"):
        text += f"; the analysis found {summary['noise_found']}"
    return text


def _noise_map_text(metadata: dict[str, Any]) -> str:
    if not metadata.get("takes_noise_map"):
        return "no"
    stated = (metadata.get("noise_map") or {}).get("source")
    older = f"{derived_noise_map_source(metadata)} (the exporter's rule: the file predates its noise_map entry)"
    source = stated or older
    return f"yes, level from: {source}"


def render_metadata(metadata: dict[str, Any], io: dict[str, list] | None = None) -> str:
    """A readable multi-line text of the model description (what ``grainwright info`` prints)."""
    architecture = metadata.get("architecture") or {}
    lines = [
        f"architecture      {architecture.get('name', '-')} ({_figure(architecture.get('hyper'))})",
        f"precision         {metadata.get('precision', '-')}",
        f"channels          {metadata.get('channels', '-')}",
        f"parameters        {metadata.get('parameters', '-'):,}" if isinstance(metadata.get("parameters"), int)
        else f"parameters        {_figure(metadata.get('parameters'))}",
        f"MACs per pixel    {_figure(metadata.get('macs_per_pixel'))}",
        f"receptive field   {metadata.get('receptive_field', '-')} px",
        f"alignment         {metadata.get('alignment', '-')} px",
        f"tile margin       {metadata.get('tile_margin', '-')} px",
        f"noise map input   {_noise_map_text(metadata)}",
    ]
    stack = metadata.get("stack")
    if stack:
        lines.append(f"stack window      {stack.get('frames')} frames along {stack.get('axis', '-')} (centre frame out, "
                     f"{stack.get('channel_order', '-')} channels, ends by {stack.get('ends', '-')}, neighbours aligned: "
                     f"{stack.get('align_neighbours', 'none')}{_revision(stack)})")
    if io:
        for kind in ("inputs", "outputs"):
            for name, type_name, shape in io[kind]:
                lines.append(f"{kind[:-1]:<17} {name}: {type_name} {_figure(shape)}")
    normalization = metadata.get("normalization") or {}
    lines += [
        f"normalisation     {normalization.get('dtype', '-')}, bit depth {_figure(normalization.get('bit_depth'))}, "
        f"native range {_figure(normalization.get('low'))}..{_figure(normalization.get('high'))}, "
        f"{normalization.get('channel_order', '-')}",
        f"transform         {_figure(normalization.get('transform'))}",
        f"noise (training)  {_figure(metadata.get('noise'))}",
        f"noise level seen  {_figure(metadata.get('training_noise'))}",
        f"scheme            {_figure(metadata.get('scheme'))}",
        f"decided           {_decisions(metadata.get('training_summary') or {})}",
        f"data fingerprint  {_figure(metadata.get('data_fingerprint'))}",
        f"training summary  {_figure(metadata.get('training_summary'))}",
    ]
    parity = metadata.get("parity") or {}
    for name in ("random", "calibration"):
        entry = parity.get(name)
        if entry:
            where = entry.get("file", "random input")
            lines.append(f"parity ({name:<11}) max |ONNX Runtime - torch| = {_figure(entry.get('max_abs_diff'))} of "
                         f"the working range on {where} {_figure(entry.get('shape'))} "
                         f"(limit {_figure(parity.get('tolerance'))})")
    int8 = metadata.get("int8")
    if int8:
        lines.append(f"INT8              {_figure(int8.get('psnr_vs_fp32_db'))} dB vs FP32 on "
                     f"{int8.get('held_out_patches')} held-out patches, {_figure(int8.get('speed_ratio_vs_fp32'))}x "
                     "FP32 speed")
    lines += [
        f"created           {metadata.get('created', '-')} by grainwright {metadata.get('tool_version', '-')}, "
        f"opset {metadata.get('opset', '-')}, description format {metadata.get('format_version')}",
        f"tiling rule       {metadata.get('tiling_rule', '-')}",
    ]
    if metadata.get("caution"):
        lines.append(f"caution           {metadata['caution']}")
    return "\n".join(lines)
