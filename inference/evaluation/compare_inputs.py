"""What a comparison is asked to do: its options, the methods list, the image set (noisy images and the clean ones
matched by name, checked as one set) and the noise estimate of each image.

The comparison itself runs in :mod:`grainwright.inference.evaluation.compare`; its ranking, findings and report
tables are made in :mod:`grainwright.inference.evaluation.compare_summary`.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from grainwright.inference.baselines.registry import ALL_CLASSICAL, BASELINES
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.common.suggest import did_you_mean
from grainwright.inference.images.imageio import effective_bit_depth, find_images, read_image
from grainwright.inference.images.normalization import Normalization
from grainwright.inference.noise.estimation import estimate_sigma, fit_poisson_gaussian
from grainwright.inference.runtime.runner import ENSEMBLE_SIZES

# Smallest image side: SSIM's 11-pixel window with room to slide, and the 4-pixel J-invariant grid.
MIN_SIDE = 16
NOISE_CHOICES = ("auto", "gaussian", "poisson-gaussian")


@dataclass(frozen=True)
class CompareOptions:
    """Settings of a comparison; ``quick`` trades thoroughness for time (for demos and tests).

    Attributes
    ----------
    quick : bool
        At most three points of each parameter grid, a 128-pixel tuning crop (else 256), J-invariant figures
        from 4 of the 16 pixel grids, 64-pixel display crops (else 128), panels for 2 images (else 6).
    noise : str
        "auto" (Poisson-Gaussian when the fit finds signal-dependent noise with confidence, else Gaussian),
        "gaussian" or "poisson-gaussian".
    threads : int or None
        ONNX Runtime threads (default all cores).
    sure_probes : int
        Monte-Carlo SURE probes per method and image (each one more run of the method).
    seed : int
        Seed of the SURE probes.
    overwrite : bool
        Replace an existing, non-empty report folder.
    size_plot : str or None
        An SVG of the model sizes tried (``size_plot.size_search_svg``) to show in the report.
    ensemble_rows : int
        1, or 2, 4 or 8: also score every ONNX model with that many flips / 90-degree rotations averaged (the
        runtime's ``--ensemble``), as a row of its own labelled ``NAME xN`` beside the model's plain row.
    """

    quick: bool = False
    noise: str = "auto"
    threads: int | None = None
    sure_probes: int = 1
    seed: int = 0
    overwrite: bool = False
    size_plot: str | None = None
    ensemble_rows: int = 1

    @property
    def tuning_crop(self) -> int:
        return 128 if self.quick else 256

    @property
    def display_crop(self) -> int:
        return 64 if self.quick else 128

    @property
    def j_invariant_passes(self) -> int | None:
        return 4 if self.quick else None

    @property
    def panel_images(self) -> int:
        return 2 if self.quick else 6

    @property
    def auto_regions(self) -> int:
        return 2 if self.quick else 4


@dataclass(frozen=True)
class MethodSpec:
    """One entry of the methods list: a classical baseline by name or an ONNX model file."""

    label: str
    kind: str  # "classical" or "learned"
    name: str | None = None  # baseline name
    path: Path | None = None  # ONNX file
    ensemble: int = 1  # learned: flips / 90-degree rotations averaged (OnnxDenoiser's self-ensemble)


# ---------------------------------------------------------------------------------------------- methods list
def parse_methods(items: str | list[str]) -> list[MethodSpec]:
    """Turn ``"model.onnx,bm3d,all-classical"`` (or a list) into method specs, in order, without repeats.

    Raises ``InputError`` for a missing model file and ``ConfigError`` for an unknown name, with suggestions.
    """
    if isinstance(items, str):
        items = [items]
    names = [part.strip() for item in items for part in item.split(",") if part.strip()]
    if not names:
        raise ConfigError("--methods: no method given (baseline names, all-classical, or .onnx files)")
    specs: list[MethodSpec] = []
    seen: set[str] = set()

    def add(spec: MethodSpec) -> None:
        if spec.label not in seen:
            seen.add(spec.label)
            specs.append(spec)

    for name in names:
        if name.lower().endswith(".onnx"):
            path = Path(name)
            if not path.is_file():
                raise InputError(path, "model file not found")
            label = path.stem if path.stem not in BASELINES else f"{path.stem}.onnx"
            if label in seen:
                label = f"{path.parent.name}/{path.stem}"
            add(MethodSpec(label, "learned", path=path))
        elif name == ALL_CLASSICAL:
            for baseline in BASELINES:
                add(MethodSpec(baseline, "classical", name=baseline))
        elif name in BASELINES:
            add(MethodSpec(name, "classical", name=name))
        else:
            known = [*BASELINES, ALL_CLASSICAL]
            hint = did_you_mean(name, known, most=3, listed=True)
            raise ConfigError(
                f"--methods: unknown method {name!r}{hint} (known: {', '.join(known)}, or a path to an .onnx file)"
            )
    return specs


def with_ensemble_rows(specs: list[MethodSpec], ensemble: int) -> list[MethodSpec]:
    """``specs`` with, after each ONNX model, the same model run with an ``ensemble``-fold self-ensemble
    (labelled ``NAME xN``); unchanged for ``ensemble`` 1.

    Raises ``ConfigError`` for a size the runtime does not offer."""
    if ensemble not in ENSEMBLE_SIZES:
        raise ConfigError(f"--ensemble-rows must be one of {ENSEMBLE_SIZES}, got {ensemble}")
    if ensemble == 1:
        return list(specs)
    expanded: list[MethodSpec] = []
    for spec in specs:
        expanded.append(spec)
        if spec.kind == "learned":
            expanded.append(replace(spec, label=f"{spec.label} x{ensemble}", ensemble=ensemble))
    return expanded


# ---------------------------------------------------------------------------------------------- image sets
@dataclass
class ImageSet:
    noisy: list[Path]
    clean: list[Path] | None


def match_images(noisy_dir: str | Path, clean_dir: str | Path | None = None) -> ImageSet:
    """The noisy images, and the clean ones matched by file name (stem); mismatched sets raise ``InputError``."""
    noisy = find_images(noisy_dir)
    if not noisy:
        raise InputError(noisy_dir, "no images found (PNG, TIFF or .npy)")
    if clean_dir is None:
        return ImageSet(noisy, None)
    clean = find_images(clean_dir)
    if not clean:
        raise InputError(clean_dir, "no images found (PNG, TIFF or .npy)")
    by_stem: dict[str, Path] = {}
    for path in clean:
        if path.stem in by_stem:
            raise InputError(path, f"two clean images share the name {path.stem!r} ({by_stem[path.stem].name})")
        by_stem[path.stem] = path
    matched = []
    for path in noisy:
        if path.stem not in by_stem:
            raise InputError(path, f"no clean image of the same name in {clean_dir}")
        matched.append(by_stem.pop(path.stem))
    if by_stem:
        extra = sorted(by_stem.values())[0]
        raise InputError(extra, f"clean image has no noisy image of the same name in {noisy_dir}")
    return ImageSet(noisy, matched)


def check_image_set(images: ImageSet) -> tuple[Normalization, int]:
    """Check channels, dtypes and pair shapes over the whole set; one normalisation for all of it.

    A first pass reads each image and keeps only its summary (memory stays at one image); the working range is
    the largest effective bit depth found, or the float range over all images.
    """
    first_path = images.noisy[0]
    reference = None
    bits, low, high = 1, math.inf, -math.inf
    pairs = zip(images.noisy, images.clean or [None] * len(images.noisy))
    for noisy_path, clean_path in pairs:
        arrays = [(noisy_path, read_image(noisy_path))]
        if clean_path is not None:
            arrays.append((clean_path, read_image(clean_path)))
            if arrays[1][1].shape != arrays[0][1].shape:
                raise InputError(clean_path, f"shape {arrays[1][1].shape} differs from the noisy {noisy_path.name} "
                                             f"{arrays[0][1].shape}")
        for path, array in arrays:
            if min(array.shape[:2]) < MIN_SIDE:
                raise InputError(path, f"is {array.shape[1]}x{array.shape[0]} pixels; comparing needs at least "
                                       f"{MIN_SIDE} on each side")
            if reference is None:
                reference = array
            if array.shape[2] != reference.shape[2]:
                raise InputError(path, f"has {array.shape[2]} channel(s), {first_path.name} has {reference.shape[2]}")
            if array.dtype != reference.dtype:
                raise InputError(path, f"is {array.dtype}, {first_path.name} is {reference.dtype}")
            if array.dtype.kind == "u":
                bits = max(bits, effective_bit_depth(array) or 1)
            low, high = min(low, float(array.min())), max(high, float(array.max()))
    if reference.dtype.kind == "u":
        normalization = Normalization.for_array(reference, bit_depth=bits)
    elif reference.dtype.kind == "f":
        extremes = np.array([low, high], dtype=reference.dtype)[None, :, None].repeat(reference.shape[2], axis=2)
        normalization = Normalization.for_array(extremes)
    else:
        normalization = Normalization.for_array(reference)
    return normalization, reference.shape[2]


# ---------------------------------------------------------------------------------------------- noise
@dataclass(frozen=True)
class NoiseEstimate:
    """The noise of one image, working units: a dict for ``baselines.domains`` and its description."""

    spec: dict[str, Any]
    gray_sigma: float  # standard deviation of the channel-averaged image's noise (MAD estimate)
    channel_sigma: float  # mean over channels of each channel's noise standard deviation (MAD estimate)
    text: str


def estimate_noise(noisy: np.ndarray, choice: str = "auto", path: str | Path | None = None) -> NoiseEstimate:
    """Estimate the noise of a working-range ``(H, W, C)`` image (see :class:`CompareOptions` ``noise``).

    ``path`` names the image in error messages.
    """
    if choice not in NOISE_CHOICES:
        raise ConfigError(f"--noise must be one of {', '.join(NOISE_CHOICES)}, got {choice!r}")
    gray_sigma = float(estimate_sigma(noisy.mean(axis=2))[0])
    sigma = np.asarray(estimate_sigma(noisy), dtype=np.float64)
    if choice != "gaussian":
        # The fit's defaults want some 15,000 2x2 blocks; small images get fewer, larger signal levels.
        blocks = noisy.shape[0] * noisy.shape[1] // 4
        fit = fit_poisson_gaussian(noisy) if blocks >= 15000 else fit_poisson_gaussian(noisy, levels=8, min_blocks=100)
        usable = fit.gain > 0
        if choice == "poisson-gaussian" and not usable:
            raise InputError(path, "--noise poisson-gaussian: the fit found no signal-dependent part in this image")
        if usable and (choice == "poisson-gaussian" or (fit.signal_dependent and fit.confident)):
            spec = {"kind": "poisson-gaussian", "gain": float(fit.gain), "read": float(fit.read)}
            text = f"Poisson-Gaussian, gain {fit.gain:.3g}, read noise {fit.read:.3g} (fitted, working units)"
            return NoiseEstimate(spec, gray_sigma, float(sigma.mean()), text)
    if not np.all(sigma > 0):
        raise InputError(path, "the estimated noise level is zero: is this image noisy, or already denoised?")
    spec = {"kind": "gaussian", "sigma": sigma.tolist()}
    text = "Gaussian, sigma " + ", ".join(f"{s:.4g}" for s in sigma) + " (MAD estimate, working units)"
    return NoiseEstimate(spec, gray_sigma, float(sigma.mean()), text)
