"""Static INT8 quantisation of an exported model, calibrated on the user's own images.

ONNX Runtime's ``quantize_static`` inserts QuantizeLinear/DequantizeLinear pairs (QDQ format) around the
convolutions of the network body, with per-channel signed 8-bit weights and unsigned 8-bit activations whose
ranges come from calibration patches (min/max). The ReLU after each convolution is folded into its output
quantisation (a zero point at the bottom of the range clips as ReLU does). Everything else stays float32: the
input, the normalisation and transform, the residual subtraction (the skip path) and the inverse mapping to
native values. The body sees an 8-bit view of its input and predicts the noise in 8 bits, but the output is the
float32 input minus that prediction, so 16-bit data is not rounded to 256 levels. A model without the skip
outputs the image itself from its last convolution, which then stays float32 for the same reason.
Quantising the first and last convolutions too was faster in a side-by-side run (default ``residual``, 1 MP,
2 threads: 2.7x FP32 against 2.2x with both kept float; the float edges cost the quantise/dequantise of wide
feature maps), so their effect on quality is left to the gate below.

The quality gate needs no clean images: the INT8 output is compared with the FP32 output on held-out patches
(PSNR with the native range as peak); below the threshold the INT8 file is not written.
"""
from __future__ import annotations

import logging
import tempfile
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np
import onnx
from onnxruntime.quantization import (
    CalibrationDataReader,
    QuantFormat,
    QuantType,
    quantize_static,
)

from grainwright.inference.common.errors import GrainwrightError
from grainwright.inference.evaluation.metrics import psnr
from grainwright.inference.images.normalization import Normalization
from grainwright.models.base import DenoisingNetwork
from grainwright.models.onnx_io import (
    CalibrationImage,
    pad_to_alignment,
    run_session,
    session_for,
)

PATCH_EDGE = 128
CALIBRATION_PATCHES = 32
HELD_OUT_PATCHES = 16
SPEED_EDGE = 512
# Convolutions, with the ReLUs folded into them and the data movement between them (pooling, pixel shuffle,
# concatenation), so that the U-Net's feature maps stay 8-bit from one convolution to the next.
QUANTIZED_OPS = ["Conv", "Relu", "MaxPool", "DepthToSpace", "Concat"]


class _Patches(CalibrationDataReader):
    def __init__(self, feeds: list[dict[str, np.ndarray]]):
        self._feeds = iter(feeds)

    def get_next(self) -> dict[str, np.ndarray] | None:
        return next(self._feeds, None)


def sample_patches(frames: list[np.ndarray], count: int, edge: int, alignment: int,
                   rng: np.random.Generator) -> list[np.ndarray]:
    """``count`` random ``(1, C, h, w)`` crops of at most ``edge`` pixels, drawn evenly from ``frames``."""
    patches = []
    for index in range(count):
        frame = frames[index % len(frames)]
        height, width = frame.shape[-2:]
        h, w = min(edge, height), min(edge, width)
        top, left = rng.integers(0, height - h + 1), rng.integers(0, width - w + 1)
        patches.append(pad_to_alignment(frame[None, :, top:top + h, left:left + w], alignment))
    return patches


def split_frames(images: list[CalibrationImage]) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Calibration and held-out frames: by image when there are several, else the top 70% / bottom 30% rows."""
    frames = [image.frame for image in images]
    if len(frames) >= 2:
        held = max(1, len(frames) // 4)
        return frames[:-held], frames[-held:]
    frame = frames[0]
    cut = int(round(frame.shape[1] * 0.7))
    if cut < 8 or frame.shape[1] - cut < 8:
        raise GrainwrightError(f"{images[0].path}: too small to split into calibration and held-out patches")
    return [frame[:, :cut]], [frame[:, cut:]]


def _body_convolutions(proto: onnx.ModelProto) -> list[str]:
    return [node.name for node in proto.graph.node if node.op_type == "Conv"]


def quantize_model(
    proto: onnx.ModelProto,
    model: DenoisingNetwork,
    normalization: Normalization,
    images: list[CalibrationImage],
    noise_map_for: Callable[[np.ndarray, bool], np.ndarray | None],
    *,
    min_psnr: float = 40.0,
    threads: int = 2,
    seed: int = 0,
) -> tuple[dict[str, Any], onnx.ModelProto]:
    """Quantise an exported FP32 model and measure it against the FP32 output.

    Returns
    -------
    report : dict
        ``psnr_vs_fp32_db``, ``held_out_patches``, ``calibration_patches``, ``speed_ratio_vs_fp32`` (FP32 time /
        INT8 time on a ``SPEED_EDGE`` square, 2 threads by default), ``min_psnr_db``, ``passed``,
        ``quantized_ops``, ``float32_nodes`` (convolutions kept in float32).
    int8 : onnx.ModelProto
        The quantised model (metadata not yet attached).
    """
    rng = np.random.default_rng(seed)
    calibration_frames, held_out_frames = split_frames(images)
    calibration = sample_patches(calibration_frames, CALIBRATION_PATCHES, PATCH_EDGE, model.alignment, rng)
    held_out = sample_patches(held_out_frames, HELD_OUT_PATCHES, PATCH_EDGE, model.alignment, rng)

    def feeds(patches: list[np.ndarray]) -> list[dict[str, np.ndarray]]:
        result = []
        for patch in patches:
            feed = {"image": patch}
            sigma = noise_map_for(patch, False)
            if sigma is not None:
                feed["noise_sigma"] = sigma
            result.append(feed)
        return result

    kept_float = [] if model.hyper.get("skip", True) else _body_convolutions(proto)[-1:]
    with tempfile.TemporaryDirectory(prefix="grainwright-int8-") as folder:
        source, target = Path(folder) / "fp32.onnx", Path(folder) / "int8.onnx"
        onnx.save(proto, source)
        quiet = logging.getLogger().level
        logging.getLogger().setLevel(logging.ERROR)  # the quantiser logs advice meant for classification models
        try:
            quantize_static(
                str(source), str(target), _Patches(feeds(calibration)),
                quant_format=QuantFormat.QDQ, op_types_to_quantize=QUANTIZED_OPS, nodes_to_exclude=kept_float,
                per_channel=True, activation_type=QuantType.QUInt8, weight_type=QuantType.QInt8,
            )
        finally:
            logging.getLogger().setLevel(quiet)
        int8 = onnx.load(target)

    fp32_session, int8_session = session_for(proto, threads), session_for(int8, threads)
    references, outputs = [], []
    for feed in feeds(held_out):
        references.append(run_session(fp32_session, feed["image"], feed.get("noise_sigma")).ravel())
        outputs.append(run_session(int8_session, feed["image"], feed.get("noise_sigma")).ravel())
    # Capped so the figure stays valid JSON (identical outputs give an infinite PSNR).
    quality = min(psnr(np.concatenate(references), np.concatenate(outputs), peak=normalization.full_range), 200.0)
    report = {
        "psnr_vs_fp32_db": float(quality),
        "min_psnr_db": float(min_psnr),
        "passed": bool(quality >= min_psnr),
        "held_out_patches": len(held_out),
        "calibration_patches": len(calibration),
        "speed_ratio_vs_fp32": speed_ratio(fp32_session, int8_session, model, normalization, noise_map_for, rng),
        "speed_threads": threads,
        "quantized_ops": QUANTIZED_OPS,
        "float32_nodes": kept_float,
        "calibration_method": "min-max",
    }
    return report, int8


def speed_ratio(fp32_session, int8_session, model: DenoisingNetwork, normalization: Normalization,
                noise_map_for: Callable[[np.ndarray, bool], np.ndarray | None], rng: np.random.Generator,
                repeats: int = 3) -> float:
    """FP32 seconds / INT8 seconds on one ``SPEED_EDGE`` square, best of ``repeats`` each, interleaved."""
    image = rng.uniform(normalization.low, normalization.high, (1, model.channels, SPEED_EDGE, SPEED_EDGE))
    image = image.astype(np.float32)
    sigma = noise_map_for(image, False)
    best = {"fp32": float("inf"), "int8": float("inf")}
    for round_number in range(repeats + 1):
        for name, session in (("fp32", fp32_session), ("int8", int8_session)):
            start = time.perf_counter()
            run_session(session, image, sigma)
            if round_number > 0:  # round 0 warms up
                best[name] = min(best[name], time.perf_counter() - start)
    return best["fp32"] / best["int8"]
