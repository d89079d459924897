"""Running exported graphs in ONNX Runtime from the torch side, and reading calibration images.

Shared by ``export`` (parity checks) and ``quantize`` (INT8 calibration), so neither imports the other's helpers.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort

from grainwright.inference.common.errors import InputError
from grainwright.inference.images.imageio import find_images, read_frames
from grainwright.inference.images.normalization import Normalization

MAX_CALIBRATION_FILES = 64  # enough frames to calibrate INT8 ranges; reading more only costs time


def session_for(proto: onnx.ModelProto | bytes, threads: int = 2) -> ort.InferenceSession:
    options = ort.SessionOptions()
    options.intra_op_num_threads = threads
    options.inter_op_num_threads = 1
    data = proto if isinstance(proto, bytes) else proto.SerializeToString()
    return ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])


def run_session(session: ort.InferenceSession, image: np.ndarray, noise_sigma: np.ndarray | None = None) -> np.ndarray:
    """Run a grainwright ONNX session on a native ``(N, C, H, W)`` float32 batch."""
    feeds = {"image": np.ascontiguousarray(image, dtype=np.float32)}
    if noise_sigma is not None and any(i.name == "noise_sigma" for i in session.get_inputs()):
        feeds["noise_sigma"] = np.ascontiguousarray(noise_sigma, dtype=np.float32)
    return session.run(["denoised"], feeds)[0]


def pad_to_alignment(image: np.ndarray, alignment: int) -> np.ndarray:
    """Pad ``(N, C, H, W)`` at the bottom and right to multiples of ``alignment`` by reflection (as the runtime)."""
    height, width = image.shape[-2:]
    extra = (-height % alignment, -width % alignment)
    if extra == (0, 0):
        return image
    return np.pad(image, ((0, 0), (0, 0), (0, extra[0]), (0, extra[1])), mode="reflect")


@dataclass
class CalibrationImage:
    path: Path
    frame: np.ndarray  # (C, H, W) float32 native values


def read_calibration(folder: str | Path, normalization: Normalization, limit: int = MAX_CALIBRATION_FILES) -> list[CalibrationImage]:
    """Read up to ``limit`` images (first frame of each) and check they fit the model's data description."""
    folder = Path(folder)
    if not folder.exists():
        raise InputError(folder, "no such calibration folder or file")
    files = find_images(folder)[:limit]
    if not files:
        raise InputError(folder, "no PNG, TIFF or npy images found for calibration")
    images = []
    for path in files:
        frames = read_frames(path)
        channels = frames.shape[-1]
        if channels != normalization.channels:
            raise InputError(path, f"has {channels} channel(s); the model takes {normalization.channels}")
        if frames.dtype.name != normalization.dtype:
            raise InputError(path, f"is {frames.dtype.name} data; the model was trained on {normalization.dtype} data")
        images.append(CalibrationImage(path, np.moveaxis(frames[0], -1, 0).astype(np.float32)))
    return images


