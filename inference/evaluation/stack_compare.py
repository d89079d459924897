"""Compare denoisers on stacks (sequences, volumes): per-slice figures, a slice view, and classical rows.

For each noisy stack (matched by file name to a clean one when given), every method runs on the whole stack:

- an exported model: a multi-frame one slides its K-frame window along the stack
  (:mod:`grainwright.inference.runtime.stack_window`), a single-frame one runs frame by frame;
- ``frame-average``: the plain K-frame average around each frame (the same window, reflected at the ends), the
  reference point for what the neighbours give where the scene holds still, and where averaging ghosts;
- ``bm3d``: BM3D (Dabov et al. 2007) on each frame alone, its noise level estimated per frame by the wavelet
  MAD estimator (Donoho and Johnstone 1994) on the noisy frame.

Figures per slice: PSNR and SSIM (Wang et al. 2004) against the clean slice when there is one, with the peak of
the data's effective bit depth; always the MAD estimate of the noise left in the output and of what was removed
(noisy - output). The slice view shows one slice (default: the middle one) of the noisy stack, each output and
the clean stack side by side. Outputs: ``stack-results.json`` (means per method and stack, and every slice),
``stack-slices.csv`` and ``slice-views/NAME.png``, each written atomically.
"""
from __future__ import annotations

import csv
import io
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from grainwright.inference.baselines.bm3d import bm3d
from grainwright.inference.common.atomic import write_json_atomic, write_text_atomic
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.evaluation.metrics import psnr, ssim
from grainwright.inference.images.imageio import effective_bit_depth, find_images, write_image
from grainwright.inference.images.stacks import read_stack
from grainwright.inference.noise.estimation import estimate_sigma
from grainwright.inference.runtime.runner import OnnxDenoiser
from grainwright.inference.runtime.stack_window import check_stack, denoise_stack_array, window_indices

CLASSICAL_ROWS = ("frame-average", "bm3d")


def frame_average(stack: np.ndarray, frames: int) -> np.ndarray:
    """The plain ``frames``-frame average around each frame of ``(N, H, W, C)``, reflected at the ends."""
    count = stack.shape[0]
    return np.stack([stack[window_indices(i, count, frames)].astype(np.float64).mean(axis=0) for i in range(count)])


def bm3d_per_frame(stack: np.ndarray) -> np.ndarray:
    """BM3D on each frame alone, the noise level estimated per frame (wavelet MAD)."""
    outputs = []
    for frame in stack.astype(np.float32):
        sigma = float(np.mean(estimate_sigma(frame)))
        outputs.append(bm3d(frame, sigma) if sigma > 0 else frame)
    return np.stack(outputs)


def _method(name: str, frames: int, threads: int | None) -> Callable[[np.ndarray], np.ndarray]:
    if name == "frame-average":
        return lambda stack: frame_average(stack, frames)
    if name == "bm3d":
        return bm3d_per_frame
    path = Path(name)
    if path.suffix.lower() != ".onnx":
        raise ConfigError(f"stack methods are .onnx files, {', '.join(CLASSICAL_ROWS)}; got '{name}'")
    denoiser = OnnxDenoiser(path, threads=threads)
    if denoiser.spec.stack_frames > 1:
        def run(stack: np.ndarray) -> np.ndarray:
            check_stack(denoiser, stack.shape[0], stack.shape[3], path)
            return denoise_stack_array(denoiser, stack)
        return run
    return lambda stack: np.stack([denoiser.run(frame, as_float=True) for frame in stack])


def _slice_rows(name: str, method: str, noisy: np.ndarray, output: np.ndarray, clean: np.ndarray | None,
                peak: float) -> list[dict[str, Any]]:
    rows = []
    for index in range(noisy.shape[0]):
        row = {"stack": name, "method": method, "slice": index,
               "noise_left": float(np.mean(estimate_sigma(output[index].astype(np.float32)))),
               "removed_sigma": float(np.mean(estimate_sigma((noisy[index] - output[index]).astype(np.float32))))}
        if clean is not None:
            row["psnr"] = psnr(clean[index], output[index], peak)
            row["ssim"] = ssim(clean[index], output[index], peak)
        rows.append(row)
    return rows


def _view(noisy: np.ndarray, outputs: dict[str, np.ndarray], clean: np.ndarray | None, index: int) -> np.ndarray:
    """One slice of each, side by side, as 8-bit grayscale scaled by the noisy slice's 0.5 and 99.5 percentiles."""
    panels = [noisy[index]] + [output[index] for output in outputs.values()]
    panels += [clean[index]] if clean is not None else []
    low, high = np.percentile(noisy[index], (0.5, 99.5))
    scale = 255.0 / max(float(high - low), 1e-9)
    gap = np.full((noisy.shape[1], 4), 255.0)
    row = np.concatenate([part for panel in panels for part in (panel[..., 0], gap)][:-1], axis=1)
    return np.clip((row - low) * scale, 0, 255).astype(np.uint8)


def compare_stacks(noisy_dir: str | Path, methods: list[str], out_dir: str | Path, *, clean_dir: str | Path | None = None,
                   frames: int = 5, view_slice: int | None = None, threads: int | None = None,
                   log: Callable[[str], None] = lambda line: None) -> dict[str, Any]:
    """Run ``methods`` (.onnx files, ``frame-average``, ``bm3d``) on every stack of ``noisy_dir`` and write the
    per-slice report into ``out_dir``; returns the JSON document (``means`` per stack and method).

    Parameters
    ----------
    frames : int
        K of the ``frame-average`` row (odd).
    view_slice : int, optional
        Slice shown in the slice views (default: the middle one of each stack).
    """
    noisy_dir, out_dir = Path(noisy_dir), Path(out_dir)
    if frames < 1 or frames % 2 == 0:
        raise ConfigError(f"--stack-frames must be odd, got {frames}")
    sources = find_images(noisy_dir)
    if not sources:
        raise InputError(noisy_dir, "no stack files (TIFF, .npy) found")
    runners = {name: _method(name, frames, threads) for name in methods}
    slices: list[dict[str, Any]] = []
    means: dict[str, dict[str, dict[str, float]]] = {}
    for source in sources:
        noisy, info = read_stack(source)
        clean = None
        if clean_dir is not None:
            matches = [path for path in find_images(Path(clean_dir)) if path.stem == source.stem]
            if not matches:
                raise InputError(source, f"has no clean stack of the same name in {clean_dir}")
            clean, clean_info = read_stack(matches[0])
            if clean.shape != noisy.shape:
                raise InputError(matches[0], f"is {clean.shape}, the noisy stack {source.name} is {noisy.shape}")
        if noisy.shape[0] < frames:
            raise InputError(source, f"has {noisy.shape[0]} frame(s), fewer than the {frames} of the frame average")
        bits = effective_bit_depth(noisy)
        peak = float(2**bits - 1) if bits else float(np.max(noisy))
        outputs = {}
        for name, run in runners.items():
            log(f"{source.name}: {name}")
            outputs[name] = np.asarray(run(noisy), np.float64)
            if np.issubdtype(noisy.dtype, np.integer):
                outputs[name] = np.clip(np.rint(outputs[name]), 0, peak)
        reference = None if clean is None else clean.astype(np.float64)
        for name, output in outputs.items():
            rows = _slice_rows(source.name, name, noisy.astype(np.float64), output, reference, peak)
            slices.extend(rows)
            means.setdefault(source.name, {})[name] = {key: float(np.mean([row[key] for row in rows]))
                                                       for key in rows[0] if key not in ("stack", "method", "slice")}
        index = noisy.shape[0] // 2 if view_slice is None else min(max(view_slice, 0), noisy.shape[0] - 1)
        write_image(out_dir / "slice-views" / f"{source.stem}.png",
                    _view(noisy.astype(np.float64), outputs, reference, index), overwrite=True)
    document = {"methods": methods, "frames": frames, "axis_order": "per stack, slices in file order",
                "panel_order": ["noisy", *methods] + (["clean"] if clean_dir is not None else []),
                "means": means, "slices": slices}
    write_json_atomic(out_dir / "stack-results.json", document)
    text = io.StringIO()
    writer = csv.DictWriter(text, fieldnames=list(slices[0]))
    writer.writeheader()
    writer.writerows(slices)
    write_text_atomic(out_dir / "stack-slices.csv", text.getvalue())
    return document
