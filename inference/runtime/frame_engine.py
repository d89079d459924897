"""One model, opened once, with fixed output settings: the engine behind ``watch`` and for integrators.

An acquisition program that already holds frames in memory calls the same engine the folder service uses, with
the same settings and the same results as ``grainwright denoise`` on a file holding that frame:

>>> from grainwright.inference.runtime.frame_engine import FrameEngine
>>> engine = FrameEngine("model.onnx", threads=2, fixed_pattern="auto")     # doctest: +SKIP
>>> clean = engine.denoise(frame)     # (H, W) or (H, W, C) native array, same shape and dtype  # doctest: +SKIP
>>> engine.model_sha256                    # which model made it, for the integrator's own records  # doctest: +SKIP

The model file is hashed once when it is opened: replacing the file on disk later changes nothing until a new
engine is opened (the service does so on a reload request), and every output records the hash of the model that
made it.
"""
from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np

from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.images.imageio import SUPPORTED_SUFFIXES
from grainwright.inference.runtime.batch import (
    FIXED_PATTERN_MODES,
    FileResult,
    Job,
    denoise_file,
    denoise_frame,
    expected_record,
)
from grainwright.inference.runtime.runner import OnnxDenoiser


class FrameEngine:
    """An exported model and the output settings, ready to denoise frames one after another.

    Parameters
    ----------
    model : str or Path
        The ``.onnx`` file written by ``grainwright export``.
    threads, tile, batch, strength, noise_sigma, ensemble
        As for :class:`grainwright.inference.runtime.runner.OnnxDenoiser`.
    fixed_pattern : {"auto", "always", "never"}
        Row/column banding removal before the model (see ``grainwright denoise --fixed-pattern``).
    out_format : {"tif", "png", "npy"}, optional
        Files only: write this format instead of the input's.
    as_float : bool
        Return (and write) float32 native values, unclipped, instead of the input's dtype.
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
        fixed_pattern: str = "auto",
        out_format: str | None = None,
        as_float: bool = False,
    ):
        if fixed_pattern not in FIXED_PATTERN_MODES:
            raise ConfigError(f"fixed-pattern mode must be one of {', '.join(FIXED_PATTERN_MODES)}, "
                              f"got {fixed_pattern!r}")
        if out_format is not None and "." + out_format.lower().lstrip(".") not in SUPPORTED_SUFFIXES:
            raise ConfigError(f"--format must be one of {', '.join(s[1:] for s in SUPPORTED_SUFFIXES)}")
        if as_float and out_format == "png":
            raise ConfigError("--float32 needs TIFF or npy output, not PNG")
        self.denoiser = OnnxDenoiser(model, threads=threads, tile=tile, batch=batch, strength=strength,
                                     noise_sigma=noise_sigma, ensemble=ensemble)
        self.fixed_pattern = fixed_pattern
        self.out_format = None if out_format is None else out_format.lower().lstrip(".")
        self.as_float = as_float
        # Hashed now, from the file as it was loaded: a later replacement on disk must not be credited.
        self.expected = expected_record(self.denoiser, out_format=self.out_format, as_float=as_float,
                                        fixed_pattern=fixed_pattern)
        stat = os.stat(self.denoiser.path)
        self.file_identity = (stat.st_ino, stat.st_size, stat.st_mtime_ns)

    @property
    def path(self) -> Path:
        return self.denoiser.path

    @property
    def model_sha256(self) -> str:
        """SHA-256 of the model file as it was when this engine opened it."""
        return self.expected["model_sha256"]

    def record(self) -> dict[str, Any]:
        """What identifies this engine's outputs: the model's hash and every setting that changes the output."""
        return {"model": self.path.name, **self.expected}

    def model_file_changed(self) -> bool:
        """Whether the model file on disk is no longer the one this engine loaded (replaced, rewritten, gone)."""
        try:
            stat = os.stat(self.path)
        except OSError:
            return True
        return (stat.st_ino, stat.st_size, stat.st_mtime_ns) != self.file_identity

    def output_name(self, source_name: str) -> str:
        """The output file name for an input file name (the suffix changes with ``out_format``)."""
        if self.out_format is None:
            return source_name
        return str(Path(source_name).with_suffix("." + self.out_format))

    def denoise(self, frame: np.ndarray) -> np.ndarray:
        """Denoise one native frame ``(H, W)`` or ``(H, W, C)``; same shape out, in its dtype unless ``as_float``.

        Raises
        ------
        InputError
            The frame does not fit the model (channel count, NaN pixels, shape).
        """
        array = np.asarray(frame)
        flat = array.ndim == 2
        if flat:
            array = array[:, :, None]
        if array.ndim != 3:
            raise InputError(None, f"expected an (H, W) or (H, W, C) frame, got shape {np.shape(frame)}")
        values, _, _ = denoise_frame(self.denoiser, array, fixed_pattern=self.fixed_pattern, as_float=self.as_float)
        return values[:, :, 0] if flat else values

    def denoise_file(self, source: Path, output: Path, *, overwrite: bool = False, durable: bool = True,
                     extra_record: dict[str, Any] | None = None) -> FileResult:
        """Denoise one file into ``output`` with the per-file engine of ``denoise`` (never raises for a per-file
        fault; see :func:`grainwright.inference.runtime.batch.denoise_file`)."""
        return denoise_file(self.denoiser, Job(Path(source), Path(output)), self.expected, overwrite=overwrite,
                            as_float=self.as_float, fixed_pattern=self.fixed_pattern, durable=durable,
                            extra_record=extra_record)
