"""Choosing a classical baseline's parameters, with or without ground truth.

With a clean reference: a small grid search that maximises PSNR. Its figures are labelled "tuned on ground
truth" wherever they appear, because a user without clean images cannot reproduce them.

Without one: J-invariant calibration (Batson and Royer, "Noise2Self: blind denoising by self-supervision",
ICML 2019). Split the pixels into ``stride^2`` interleaved grids; for each grid, replace its pixels by the mean
of their four neighbours (which lie on other grids), denoise, and keep the output on that grid only. The
result is J-invariant: no output pixel saw its own noisy value. For such a denoiser ``g`` and noise that is
zero-mean and independent between pixels,

    E |g(y) - y|^2 = E |g(y) - x|^2 + E |y - x|^2,

so the self-supervised loss ``|g(y) - y|^2`` ranks parameters like the true error ``|g(y) - x|^2`` does, up to
the noise variance, without ever seeing the clean ``x``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
from scipy import ndimage

from grainwright.inference.baselines.domains import (
    NoiseLike,
    denoise_in_domain,
    gaussian_domain,
)
from grainwright.inference.baselines.registry import get_baseline, resolve_params
from grainwright.inference.common.errors import InputError
from grainwright.inference.evaluation.metrics import psnr

GROUND_TRUTH_LABEL = "tuned on ground truth"
CALIBRATED_LABEL = "calibrated without ground truth (J-invariant)"

Denoise = Callable[[np.ndarray], np.ndarray]


@dataclass
class Tuning:
    """The parameters chosen for one baseline on one image, and every grid point tried.

    Attributes
    ----------
    name : baseline name.
    params : the full parameter set chosen (grid values plus sigma-derived defaults).
    score : PSNR in dB for ground-truth tuning (higher is better); J-invariant loss, mean squared, for
        calibration (lower is better).
    label : ``GROUND_TRUTH_LABEL`` or ``CALIBRATED_LABEL``, to print beside every figure.
    trials : ``(grid point, score)`` for each point of the grid, in grid order.
    """

    name: str
    params: dict[str, Any]
    score: float
    label: str
    trials: list[tuple[dict[str, Any], float]] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name, "params": self.params, "score": self.score, "label": self.label,
            "trials": [{"params": point, "score": score} for point, score in self.trials],
        }


def _hwc(image: np.ndarray) -> np.ndarray:
    array = np.asarray(image, dtype=np.float32)
    return array[:, :, None] if array.ndim == 2 else array


def _grid(
    name: str, kind: str, grid: list[dict[str, Any]] | None, noise: NoiseLike, include_defaults: bool
) -> list[dict[str, Any]]:
    """The grid points to try; with ``include_defaults``, also the defaults (so tuning never loses to them)."""
    points = get_baseline(name).grid(kind) if grid is None else [dict(point) for point in grid]
    if include_defaults:
        defaults = resolve_params(name, _relative_sigma(noise))
        keys = sorted({key for point in points for key in point})
        default_point = {key: defaults[key] for key in keys}
        if default_point not in points:
            points.append(default_point)
    return points


def _relative_sigma(noise: NoiseLike) -> float:
    domain = gaussian_domain(noise)
    return float(np.mean(domain.sigma)) / domain.data_range


def tune_on_ground_truth(
    name: str,
    noisy: np.ndarray,
    clean: np.ndarray,
    noise: NoiseLike,
    *,
    peak: float = 1.0,
    grid: list[dict[str, Any]] | None = None,
    include_defaults: bool = True,
) -> Tuning:
    """Grid search for the parameters of baseline ``name`` that maximise PSNR against ``clean``.

    Parameters
    ----------
    name : a baseline name.
    noisy, clean : images of the same shape, working range.
    noise : the noise (a Gaussian sigma, a noise model or its dict; see ``baselines.domains``).
    peak : PSNR peak in the images' units (1.0 for the working range).
    grid : points to try as keyword dicts; default the baseline's "search" grid.
    include_defaults : also try the sigma-derived defaults (restricted to the grid's keys).

    Returns
    -------
    ``Tuning`` labelled ``GROUND_TRUTH_LABEL``; ``score`` is the best PSNR in dB.
    """
    noisy, clean = _hwc(noisy), _hwc(clean)
    if noisy.shape != clean.shape:
        raise InputError(None, f"noisy image {noisy.shape} and clean image {clean.shape} differ in shape")
    trials = []
    for point in _grid(name, "search", grid, noise, include_defaults):
        trials.append((point, psnr(clean, denoise_in_domain(name, noisy, noise, **point), peak)))
    best_point, best_score = max(trials, key=lambda trial: trial[1])
    params = resolve_params(name, _relative_sigma(noise), best_point)
    return Tuning(name, params, float(best_score), GROUND_TRUTH_LABEL, trials)


def _neighbour_mean(image: np.ndarray) -> np.ndarray:
    """Mean of the four nearest neighbours of every pixel, per channel, mirrored at the border."""
    kernel = np.array([[0.0, 0.25, 0.0], [0.25, 0.0, 0.25], [0.0, 0.25, 0.0]], dtype=np.float32)
    return ndimage.convolve(image, kernel[:, :, None], mode="mirror")


def grid_offsets(stride: int, passes: int | None = None) -> list[tuple[int, int]]:
    """The ``(row, column)`` offsets of the interleaved pixel grids to use, spread over the stride cell.

    ``passes=None`` uses all ``stride^2`` grids (every pixel is scored once); fewer passes score a subset
    of pixels, an unbiased but noisier estimate, at a fraction of the cost.
    """
    cells = stride * stride
    count = cells if passes is None else max(1, min(int(passes), cells))
    # Evenly spaced through the cell, each row shifted by its index so a few passes cover rows and columns.
    picks = [k * cells // count for k in range(count)]
    return [(n // stride, (n + n // stride) % stride) for n in picks]


def j_invariant_output(
    denoise: Denoise, noisy: np.ndarray, *, stride: int = 4, passes: int | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """The J-invariant version of ``denoise`` applied to ``noisy`` (Batson and Royer 2019).

    Returns the output and a boolean ``(H, W)`` mask of the pixels it defines (all of them when ``passes``
    is None). ``denoise`` maps an ``(H, W, C)`` float32 image to one of the same shape.
    """
    noisy = _hwc(noisy)
    height, width = noisy.shape[:2]
    interpolated = _neighbour_mean(noisy)
    output = np.zeros_like(noisy)
    scored = np.zeros((height, width), dtype=bool)
    for row, column in grid_offsets(stride, passes):
        grid = np.zeros((height, width), dtype=bool)
        grid[row::stride, column::stride] = True
        masked = np.where(grid[:, :, None], interpolated, noisy)
        output[grid] = _hwc(denoise(masked))[grid]
        scored |= grid
    return output, scored


def j_invariant_loss(denoise: Denoise, noisy: np.ndarray, *, stride: int = 4, passes: int | None = None) -> float:
    """Self-supervised loss: mean squared difference between the J-invariant output and ``noisy``.

    Equals the true mean squared error plus the noise variance in expectation (Batson and Royer 2019), so it
    ranks denoisers or parameters without ground truth. Works for any black-box ``denoise``.
    """
    noisy = _hwc(noisy)
    output, scored = j_invariant_output(denoise, noisy, stride=stride, passes=passes)
    return float(np.mean((output[scored].astype(np.float64) - noisy[scored]) ** 2))


def calibrate(
    name: str,
    noisy: np.ndarray,
    noise: NoiseLike,
    *,
    grid: list[dict[str, Any]] | None = None,
    stride: int = 4,
    passes: int | None = None,
    include_defaults: bool = True,
) -> Tuning:
    """J-invariant calibration of baseline ``name`` on ``noisy`` alone (Batson and Royer 2019).

    Parameters
    ----------
    name : a baseline name.
    noisy : the noisy image, working range.
    noise : the noise (a Gaussian sigma, a noise model or its dict; see ``baselines.domains``).
    grid : points to try as keyword dicts; default the baseline's "calibration" grid.
    stride : spacing of the interleaved pixel grids (``stride^2`` denoiser runs per point with all passes).
    passes : how many of the grids to score (None: all); 4 of 16 is a usable quick estimate.
    include_defaults : also try the sigma-derived defaults (restricted to the grid's keys).

    Returns
    -------
    ``Tuning`` labelled ``CALIBRATED_LABEL``; ``score`` is the lowest J-invariant loss.
    """
    noisy = _hwc(noisy)
    trials = []
    for point in _grid(name, "calibration", grid, noise, include_defaults):
        loss = j_invariant_loss(
            lambda image, point=point: denoise_in_domain(name, image, noise, **point), noisy,
            stride=stride, passes=passes,
        )
        trials.append((point, loss))
    best_point, best_loss = min(trials, key=lambda trial: trial[1])
    params = resolve_params(name, _relative_sigma(noise), best_point)
    return Tuning(name, params, float(best_loss), CALIBRATED_LABEL, trials)
