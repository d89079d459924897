"""Compare learned ONNX models and classical baselines on the user's own images, with or without ground truth.

    from grainwright.inference.evaluation.compare import CompareOptions, run_comparison
    result = run_comparison("frames/noisy", ["model.onnx", "all-classical"], "report",
                            clean_dir="frames/clean", options=CompareOptions(quick=True))
    result.ranking[0]["method"], result.report_dir / "index.html"

Per image, in the float working range (the effective bit depth's full range maps to [0, 1], so a PSNR with peak
1 there is the PSNR with the bit depth's maximum as peak):

1. the noise is estimated: Gaussian sigma per channel by the wavelet MAD estimator, or, when the fit finds it
   signal-dependent with confidence, Poisson-Gaussian gain and read noise;
2. classical parameters are tuned on ground truth (grid search on PSNR, labelled so in every table) when clean
   images are given, else by J-invariant calibration, both on a centre crop;
3. every method runs once on the whole image (timed: seconds per megapixel), its output clipped to the range;
4. figures: PSNR, SSIM and MS-SSIM with ground truth; always Monte-Carlo SURE's estimated PSNR (in the
   Anscombe domain for Poisson-Gaussian noise), the J-invariant loss on the centre crop, the no-reference
   figures, contrast retention in the regions of interest, the removed-structure share and the added-edge flag.

Ranking: by mean PSNR with ground truth; without, by SURE's estimated PSNR to 0.1 dB, then the J-invariant loss.
"""
from __future__ import annotations

import json
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy import ndimage

from grainwright.inference.baselines.domains import denoise_in_domain
from grainwright.inference.baselines.registry import (
    ALL_CLASSICAL,
    BASELINES,
    get_baseline,
)
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.common.suggest import did_you_mean
from grainwright.inference.evaluation.calibration import (
    CALIBRATED_LABEL,
    GROUND_TRUTH_LABEL,
    calibrate,
    j_invariant_loss,
    tune_on_ground_truth,
)
from grainwright.inference.evaluation.detail import (
    Region,
    added_structure,
    check_box,
    contrast_retention,
    contrast_standard_error,
    contrast_to_noise,
    find_regions,
    load_regions,
    most_detailed_box,
    removed_structure,
)
from grainwright.inference.evaluation.metrics import psnr, ssim
from grainwright.inference.evaluation.quality import ms_ssim, no_reference_figures
from grainwright.inference.evaluation.report import (
    Column,
    CropSet,
    ImagePanels,
    ReportContent,
    write_report,
)
from grainwright.inference.evaluation.sure import (
    SureEstimate,
    sure_mse,
    sure_mse_stabilized,
    unclipped_mask,
)
from grainwright.inference.images import transforms
from grainwright.inference.images.crops import centre_crop
from grainwright.inference.images.imageio import (
    effective_bit_depth,
    find_images,
    read_image,
)
from grainwright.inference.images.normalization import Normalization
from grainwright.inference.noise.estimation import estimate_sigma, fit_poisson_gaussian
from grainwright.inference.runtime.runner import OnnxDenoiser

LEARNED_LABEL = "learned (ONNX model as exported)"
# Regions whose noisy feature-minus-background contrast is under this many standard errors are too faint for
# their contrast retention (a ratio with that contrast below) to mean much (common practice, no source).
CLEAR_CONTRAST = 3.0
# Smallest image side: SSIM's 11-pixel window with room to slide, and the 4-pixel J-invariant grid.
MIN_SIDE = 16
NOISE_CHOICES = ("auto", "gaussian", "poisson-gaussian")
Denoise = Callable[[np.ndarray], np.ndarray]


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
    """

    quick: bool = False
    noise: str = "auto"
    threads: int | None = None
    sure_probes: int = 1
    seed: int = 0
    overwrite: bool = False
    size_plot: str | None = None

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


@dataclass
class CompareResult:
    """What :func:`run_comparison` returns: the report folder and the tables it holds.

    ``ranking`` is one dict per method, best first (keys as in ``results.json``: ``rank``, ``method``,
    ``kind``, ``parameter_choice``, ``psnr``, ``ssim``, ``ms_ssim``, ``sure_psnr``, ``j_invariant_loss``,
    ``seconds_per_megapixel``, ``contrast_retention_mean``, ``contrast_retention_min``, ``structured_fraction``,
    ...); ``per_image`` one dict per image and method; ``regions`` one per image, region and method.
    """

    report_dir: Path
    ground_truth: bool
    ranking: list[dict[str, Any]]
    per_image: list[dict[str, Any]]
    regions: list[dict[str, Any]]
    findings: list[str]
    settings: dict[str, Any] = field(default_factory=dict)


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


def _check_set(images: ImageSet) -> tuple[Normalization, int]:
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


def sure_figure(denoise: Denoise, noisy: np.ndarray, output: np.ndarray, noise: NoiseEstimate,
                probes: int, seed: int) -> tuple[SureEstimate | None, str, float]:
    """Monte-Carlo SURE of one method on one image, over the pixels clear of the clipping levels.

    In the Anscombe domain for Poisson-Gaussian noise. Returns the estimate (None when it is unusable: a
    non-positive error or a divergence outside [-0.25, 1.5], which happens when a method's output jumps under
    the small probe), the domain's name, and the share of pixels scored.
    """
    if noise.spec["kind"] == "poisson-gaussian":
        gain, read = noise.spec["gain"], noise.spec["read"]

        def forward(values: np.ndarray) -> np.ndarray:
            return transforms.anscombe_forward(values, gain, read)

        def inverse(values: np.ndarray) -> np.ndarray:
            return transforms.anscombe_inverse_algebraic(values, gain, read)

        local = ndimage.gaussian_filter(noisy.astype(np.float64), (2.0, 2.0, 0.0))
        mask = unclipped_mask(noisy, np.sqrt(gain * np.maximum(local, 0.0) + read * read))
        peak = float(forward(np.float64(1.0)) - forward(np.float64(0.0)))
        domain = "Anscombe domain"
        if not mask.any():
            return None, domain, 0.0
        estimate = sure_mse_stabilized(denoise, noisy, forward, inverse, peak=peak, probes=probes, output=output,
                                       mask=mask, seed=seed)
    else:
        sigma = np.asarray(noise.spec["sigma"], dtype=np.float64)
        mask = unclipped_mask(noisy, sigma)
        domain = "working range"
        if not mask.any():
            return None, domain, 0.0
        estimate = sure_mse(denoise, noisy, sigma, peak=1.0, probes=probes, output=output, mask=mask, seed=seed)
    usable = estimate.mse > 0 and -0.25 <= estimate.divergence <= 1.5
    return (estimate if usable else None), domain, float(mask.mean())


# ---------------------------------------------------------------------------------------------- running
def _crop(image: np.ndarray, box: tuple[int, int, int, int]) -> np.ndarray:
    x, y, w, h = box
    return image[y : y + h, x : x + w]


def _box_around(box: tuple[int, int, int, int], size: int, shape: tuple[int, ...]) -> tuple[int, int, int, int]:
    """A ``size`` square (clipped to the image) centred on ``box``."""
    height, width = shape[:2]
    x, y, w, h = box
    side_x, side_y = min(size, width), min(size, height)
    left = int(min(max(0, x + w // 2 - side_x // 2), width - side_x))
    top = int(min(max(0, y + h // 2 - side_y // 2), height - side_y))
    return (left, top, side_x, side_y)


def _quick_grid(grid: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """At most three points, evenly spread over the grid (first, middle, last)."""
    if len(grid) <= 3:
        return grid
    return [grid[0], grid[len(grid) // 2], grid[-1]]


def _reduce(plane: np.ndarray, longest: int = 320) -> np.ndarray:
    """Block-average a map so its longer side is at most about ``longest`` pixels (keeps report memory small)."""
    factor = max(1, math.ceil(max(plane.shape) / longest))
    if factor == 1:
        return plane
    height, width = (plane.shape[0] // factor) * factor, (plane.shape[1] // factor) * factor
    blocks = plane[:height, :width].astype(np.float32).reshape(height // factor, factor, width // factor, factor)
    return blocks.mean(axis=(1, 3))


class _LearnedMethod:
    """An ONNX model seen as a working-range denoiser for one image's normalisation and noise level."""

    def __init__(self, spec: MethodSpec, threads: int | None):
        self.denoiser = OnnxDenoiser(spec.path, threads=threads)
        self.path = spec.path

    def check_channels(self, channels: int, where: Path) -> None:
        expected = self.denoiser.spec.channels
        if expected is not None and expected != channels:
            raise InputError(self.path, f"the model takes {expected} channel(s), the images in {where} have {channels}")

    def function(self, normalization: Normalization, native_sigma: float) -> Denoise:
        def denoise(working: np.ndarray) -> np.ndarray:
            native = normalization.from_working_float(working)
            output = self.denoiser.run(native, sigma=native_sigma, as_float=True)
            return normalization.to_working(output)

        return denoise


def _clipped(function: Denoise) -> Denoise:
    return lambda image: np.clip(function(image), 0.0, 1.0).astype(np.float32)


def run_comparison(
    noisy_dir: str | Path,
    methods: str | list[str],
    out_dir: str | Path,
    *,
    clean_dir: str | Path | None = None,
    rois: str | Path | None = None,
    options: CompareOptions = CompareOptions(),
    log: Callable[[str], Any] | None = None,
) -> CompareResult:
    """Compare methods on a folder of noisy images (and matching clean ones when given); write the report.

    Parameters
    ----------
    noisy_dir : folder of noisy images (PNG, TIFF, .npy).
    methods : ``"a.onnx,bm3d,all-classical"`` or a list of such items.
    out_dir : report folder (``results.csv``, ``results.json``, ``index.html``, ``images/``).
    clean_dir : clean images matched to the noisy ones by file name; enables PSNR, SSIM, MS-SSIM and ground
        truth tuning.
    rois : regions file, ``{image file name: {region name: {"feature": [x, y, w, h], "background": [...]}}}``;
        images it does not list get regions found automatically.
    options : :class:`CompareOptions`.
    log : called with one line per step (e.g. ``print``).

    Returns
    -------
    CompareResult
    """
    say = log or (lambda text: None)
    started = time.perf_counter()
    specs = parse_methods(methods)
    images = match_images(noisy_dir, clean_dir)
    regions_file = load_regions(rois) if rois is not None else {}
    out_dir = Path(out_dir)
    if out_dir.exists() and (not out_dir.is_dir() or any(out_dir.iterdir())) and not options.overwrite:
        raise InputError(out_dir, "report folder exists and is not empty (not overwritten without --overwrite)")

    normalization, channels = _check_set(images)
    learned = {spec.label: _LearnedMethod(spec, options.threads) for spec in specs if spec.kind == "learned"}
    for method in learned.values():
        method.check_channels(channels, Path(noisy_dir))

    ground_truth = images.clean is not None
    rows: list[dict[str, Any]] = []
    details: list[dict[str, Any]] = []
    panels: list[ImagePanels] = []
    noise_texts: list[str] = []
    for index, path in enumerate(images.noisy):
        noisy = normalization.to_working(read_image(path))
        clean = normalization.to_working(read_image(images.clean[index])) if ground_truth else None
        noise = estimate_noise(noisy, options.noise, path)
        noise_texts.append(f"{path.name}: {noise.text}")
        say(f"[{index + 1}/{len(images.noisy)}] {path.name}: {noise.text}")
        native_sigma = noise.channel_sigma * normalization.full_range  # what the runtime's own estimate gives
        regions = _regions_for(path, noisy, noise, regions_file, rois, options)
        outputs: dict[str, np.ndarray] = {}
        structure_maps: dict[str, np.ndarray] = {}
        added_maps: dict[str, np.ndarray] = {}
        for spec in specs:
            say(f"    {spec.label}")
            row, output, maps = _run_and_score(spec, learned, noisy, clean, noise, native_sigma, normalization, options)
            rows.append({"image": path.name, **row})
            for region in regions:
                details.append(_region_row(path.name, region, noisy, output, noise, row))
            if index < options.panel_images:
                outputs[spec.label] = output
                structure_maps[spec.label] = _reduce(maps["structure"])
                added_maps[spec.label] = _reduce(maps["added"].astype(np.float32)) > 0.2
        if index < options.panel_images:
            panel = _panels(path.name, noisy, clean, outputs, regions, noise, options)
            panel.structure_maps.update(structure_maps)
            panel.added_maps.update(added_maps)
            panels.append(panel)

    ranking = _rank(rows, specs, ground_truth)
    findings = _findings(ranking, rows, details, ground_truth)
    settings = {
        "noisy images": f"{noisy_dir} ({len(images.noisy)} image(s))",
        "clean images": str(clean_dir) if ground_truth else "none (ranking without ground truth)",
        "methods": ", ".join(spec.label for spec in specs),
        "classical parameters": GROUND_TRUTH_LABEL if ground_truth else CALIBRATED_LABEL,
        "working range": f"{normalization.low:g} to {normalization.high:g} native "
                         f"({normalization.bit_depth or 'float'} bit) maps to 0 to 1; PSNR peak = that range",
        "noise": "; ".join(noise_texts),
        "regions": f"from {rois}" if rois else "found automatically",
        "quick": options.quick,
        "ONNX Runtime threads": options.threads or "all cores",
        "total time (s)": round(time.perf_counter() - started, 1),
    }
    content = _content(settings, findings, ranking, rows, details, panels, ground_truth, options)
    write_report(out_dir, content, overwrite=options.overwrite)
    say(f"report: {out_dir / 'index.html'}")
    return CompareResult(out_dir, ground_truth, ranking, rows, details, findings, settings)


def _regions_for(path: Path, noisy: np.ndarray, noise: NoiseEstimate, regions_file: dict[str, list[Region]],
                 rois: str | Path | None, options: CompareOptions) -> list[Region]:
    listed = regions_file.get(path.name, regions_file.get(path.stem))
    if listed is None:
        return find_regions(noisy, noise.gray_sigma, count=options.auto_regions)
    for region in listed:
        try:
            check_box(region.feature, noisy.shape, f"{path.name}/{region.name} feature")
            check_box(region.background, noisy.shape, f"{path.name}/{region.name} background")
        except InputError as error:
            raise InputError(rois, error.problem) from None
    return listed


def _run_and_score(spec: MethodSpec, learned: dict[str, _LearnedMethod], noisy: np.ndarray, clean: np.ndarray | None,
                   noise: NoiseEstimate, native_sigma: float, normalization: Normalization,
                   options: CompareOptions) -> tuple[dict[str, Any], np.ndarray, dict[str, np.ndarray]]:
    """Choose parameters, run, time and score one method on one image; also its removed/added maps."""
    row: dict[str, Any] = {"method": spec.label, "kind": spec.kind}
    tuning_noisy = centre_crop(noisy, options.tuning_crop)
    jinv_loss = None
    if spec.kind == "classical":
        grid = get_baseline(spec.name).grid("search" if clean is not None else "calibration")
        grid = _quick_grid(grid) if options.quick else grid
        if clean is not None:
            tuning = tune_on_ground_truth(spec.name, tuning_noisy, centre_crop(clean, options.tuning_crop),
                                          noise.spec, grid=grid)
        else:
            tuning = calibrate(spec.name, tuning_noisy, noise.spec, grid=grid, passes=options.j_invariant_passes)
            # The calibration's best score is the J-invariant loss of the chosen parameters on this same crop.
            jinv_loss = tuning.score
        params = tuning.params
        row["parameter_choice"] = tuning.label
        row["parameters"] = json.dumps(params, default=str)
        denoise = _clipped(lambda image, name=spec.name, p=params: denoise_in_domain(name, image, noise.spec, **p))
    else:
        row["parameter_choice"] = LEARNED_LABEL
        row["parameters"] = ""
        denoise = _clipped(learned[spec.label].function(normalization, native_sigma))

    start = time.perf_counter()
    output = denoise(noisy)
    elapsed = time.perf_counter() - start
    megapixels = noisy.shape[0] * noisy.shape[1] / 1e6
    row["seconds_per_megapixel"] = elapsed / megapixels

    if clean is not None:
        row["psnr"] = psnr(clean, output, 1.0)
        row["ssim"] = ssim(clean, output, 1.0)
        row["ms_ssim"] = ms_ssim(clean, output, 1.0)
    estimate, domain, scored = sure_figure(denoise, noisy, output, noise, options.sure_probes, options.seed)
    row["sure_psnr"] = estimate.psnr if estimate else None
    row["sure_standard_error"] = estimate.psnr_standard_error if estimate else None
    row["sure_domain"] = domain
    row["sure_pixels_scored"] = scored
    if jinv_loss is None:
        jinv_loss = j_invariant_loss(denoise, tuning_noisy, passes=options.j_invariant_passes)
    row["j_invariant_loss"] = jinv_loss
    row.update(no_reference_figures(noisy, output))
    structure = removed_structure(noisy, output, noise.gray_sigma)
    added = added_structure(noisy, output, noise.gray_sigma)
    row["structured_fraction"] = structure["structured_fraction"]
    row["added_structure"] = added["flag"]
    row["added_edge_pixels"] = added["added_pixels"]
    return row, output, {"structure": structure["map"], "added": added["map"]}


def _region_row(image: str, region: Region, noisy: np.ndarray, output: np.ndarray, noise: NoiseEstimate,
                row: dict[str, Any]) -> dict[str, Any]:
    gray = noisy.mean(axis=2)
    fx, fy, fw, fh = region.feature
    bx, by, bw, bh = region.background
    noisy_contrast = float(gray[fy : fy + fh, fx : fx + fw].mean() - gray[by : by + bh, bx : bx + bw].mean())
    return {
        "image": image,
        "region": region.name,
        "method": row["method"],
        "parameter_choice": row["parameter_choice"],
        "contrast_retention": contrast_retention(noisy, output, region),
        "cnr_output": contrast_to_noise(output, region),
        "cnr_noisy": contrast_to_noise(noisy, region),
        "noisy_contrast_in_standard_errors": abs(noisy_contrast) / contrast_standard_error(region, noise.gray_sigma),
        "feature_box": list(region.feature),
        "background_box": list(region.background),
    }


def _panels(name: str, noisy: np.ndarray, clean: np.ndarray | None, outputs: dict[str, np.ndarray],
            regions: list[Region], noise: NoiseEstimate, options: CompareOptions) -> ImagePanels:
    size = options.display_crop
    boxes = [("most detailed region", most_detailed_box(noisy, size))]
    boxes += [(f"region {region.name}", _box_around(region.feature, size, noisy.shape)) for region in regions]
    crops = [
        CropSet(title, box, _crop(noisy, box), None if clean is None else _crop(clean, box),
                {label: _crop(output, box) for label, output in outputs.items()})
        for title, box in boxes
    ]
    return ImagePanels(name, noise.gray_sigma, crops, _reduce(noisy.mean(axis=2)))


def _mean(values: list[Any]) -> float | None:
    numbers = [float(v) for v in values if v is not None and not (isinstance(v, float) and math.isnan(v))]
    return float(np.mean(numbers)) if numbers else None


def _rank(rows: list[dict[str, Any]], specs: list[MethodSpec], ground_truth: bool) -> list[dict[str, Any]]:
    summary = []
    for spec in specs:
        mine = [row for row in rows if row["method"] == spec.label]
        entry = {"method": spec.label, "kind": spec.kind, "parameter_choice": mine[0]["parameter_choice"]}
        for key in ("psnr", "ssim", "ms_ssim", "sure_psnr", "sure_standard_error", "j_invariant_loss",
                    "residual_autocorrelation", "noise_left", "residual_output_correlation", "structured_fraction"):
            entry[key] = _mean([row.get(key) for row in mine])
        total_seconds = sum(row["seconds_per_megapixel"] for row in mine)
        entry["seconds_per_megapixel"] = total_seconds / len(mine)
        entry["added_structure_images"] = sum(bool(row["added_structure"]) for row in mine)
        summary.append(entry)
    by_loss = sorted(summary, key=lambda entry: entry["j_invariant_loss"])
    for position, entry in enumerate(by_loss, 1):
        entry["j_invariant_rank"] = position
    def sure_key(entry: dict[str, Any]) -> tuple[float, float]:
        estimate = entry["sure_psnr"]
        bucket = round(estimate / 0.1) if estimate is not None else -math.inf  # unusable estimates last
        return (-bucket, entry["j_invariant_loss"])

    by_sure = sorted(summary, key=sure_key)
    for position, entry in enumerate(by_sure, 1):
        entry["sure_rank"] = position
    if ground_truth:
        ordered = sorted(summary, key=lambda entry: -entry["psnr"])
    else:
        ordered = by_sure
    for position, entry in enumerate(ordered, 1):
        entry["rank"] = position
    return [{"rank": e.pop("rank"), **e} for e in ordered]


def _clear_of_noise(detail: dict[str, Any]) -> bool:
    """A region whose noisy contrast is at least ``CLEAR_CONTRAST`` standard errors: its retention means something."""
    return math.isfinite(detail["contrast_retention"]) and detail["noisy_contrast_in_standard_errors"] >= CLEAR_CONTRAST


def _add_retention(ranking: list[dict[str, Any]], details: list[dict[str, Any]]) -> None:
    for entry in ranking:
        values = [d["contrast_retention"] for d in details if d["method"] == entry["method"] and _clear_of_noise(d)]
        entry["contrast_retention_mean"] = float(np.mean(values)) if values else None
        entry["contrast_retention_min"] = float(np.min(values)) if values else None


def _findings(ranking: list[dict[str, Any]], rows: list[dict[str, Any]], details: list[dict[str, Any]],
              ground_truth: bool) -> list[str]:
    _add_retention(ranking, details)
    best = ranking[0]
    findings = []
    if ground_truth:
        findings.append(f"Best by PSNR against the clean images: {best['method']} ({best['psnr']:.2f} dB; classical "
                        f"parameters {GROUND_TRUTH_LABEL}).")
        classical = [e for e in ranking if e["kind"] == "classical"]
        for entry in (e for e in ranking if e["kind"] == "learned"):
            if classical:
                gain = entry["psnr"] - classical[0]["psnr"]
                findings.append(f"{entry['method']}: {gain:+.2f} dB PSNR against the best classical method "
                                f"({classical[0]['method']}, {GROUND_TRUTH_LABEL}).")
        agree, pairs = _sure_agreement(ranking)
        if pairs:
            findings.append(f"SURE's estimated PSNR orders {agree} of {pairs} method pairs whose true PSNRs differ by "
                            f"1 dB or more as the true PSNR does.")
    else:
        if best["sure_psnr"] is not None:
            findings.append(f"Best by SURE's estimated PSNR (no ground truth): {best['method']} "
                            f"({best['sure_psnr']:.2f} dB estimated).")
        unusable = [e["method"] for e in ranking if e["sure_psnr"] is None]
        if unusable:
            findings.append("SURE gave no usable estimate for " + ", ".join(unusable) + " (output jumps under a "
                            "small change of input, or no pixel clear of clipping); ranked last, by J-invariant "
                            "loss.")
        disagreements = [e["method"] for e in ranking if abs(e["j_invariant_rank"] - e["rank"]) >= 2]
        if disagreements:
            findings.append("The J-invariant loss ranks these methods two or more places away from SURE: "
                            + ", ".join(disagreements) + ".")
    most = max(ranking, key=lambda e: e["structured_fraction"] or 0.0)
    if (most["structured_fraction"] or 0.0) > 0:
        findings.append(f"Removed the most structure: {most['method']} (removed content follows the image over "
                        f"{100 * most['structured_fraction']:.1f}% of the pixels).")
    added = [e["method"] for e in ranking if e["added_structure_images"]]
    findings.append("Added edges absent from the smoothed input: " + (", ".join(added) if added else "none flagged")
                    + ".")
    finite = [d for d in details if _clear_of_noise(d)]
    if len(finite) < len(details):
        faint = len({(d["image"], d["region"]) for d in details if not _clear_of_noise(d)})
        findings.append(f"{faint} region(s) have a noisy contrast under {CLEAR_CONTRAST:g} standard errors: their "
                        "contrast retention is listed but left out of the summaries.")
    if finite:
        worst = min(finite, key=lambda d: d["contrast_retention"])
        findings.append(f"Lowest contrast retention: {worst['method']} at {worst['region']} in {worst['image']} "
                        f"({worst['contrast_retention']:.2f}).")
    return findings


def _sure_agreement(ranking: list[dict[str, Any]]) -> tuple[int, int]:
    agree = pairs = 0
    for i, a in enumerate(ranking):
        for b in ranking[i + 1 :]:
            if a["sure_psnr"] is not None and b["sure_psnr"] is not None and abs(a["psnr"] - b["psnr"]) >= 1.0:
                pairs += 1
                agree += (a["psnr"] > b["psnr"]) == (a["sure_psnr"] > b["sure_psnr"])
    return agree, pairs


def _content(settings: dict[str, Any], findings: list[str], ranking: list[dict[str, Any]],
             rows: list[dict[str, Any]], details: list[dict[str, Any]], panels: list[ImagePanels],
             ground_truth: bool, options: CompareOptions) -> ReportContent:
    quality = [Column("psnr", "PSNR (dB)"), Column("ssim", "SSIM", 3), Column("ms_ssim", "MS-SSIM", 3)] \
        if ground_truth else []
    no_reference = [
        Column("sure_psnr", "SURE estimated PSNR (dB)"),
        Column("j_invariant_loss", "J-invariant loss", 6),
        Column("residual_autocorrelation", "residual autocorrelation", 3),
        Column("noise_left", "noise left", 3),
        Column("residual_output_correlation", "residual-output correlation", 3),
        Column("structured_fraction", "removed-structure share", 4),
    ]
    ranking_columns = [
        Column("rank", "rank", 0), Column("method", "method", None), Column("kind", "kind", None),
        Column("parameter_choice", "parameter choice", None), *quality, *no_reference,
        Column("sure_rank", "rank by SURE", 0), Column("j_invariant_rank", "rank by J-invariant loss", 0),
        Column("contrast_retention_mean", "contrast retention (mean, clear regions)"),
        Column("contrast_retention_min", "contrast retention (lowest, clear regions)"),
        Column("added_structure_images", "images with added edges", 0),
        Column("seconds_per_megapixel", "seconds per megapixel", 3),
    ]
    row_columns = [
        Column("image", "image", None), Column("method", "method", None), Column("kind", "kind", None),
        Column("parameter_choice", "parameter choice", None), Column("parameters", "parameters", None), *quality,
        *no_reference, Column("sure_standard_error", "SURE standard error (dB)", 2),
        Column("sure_domain", "SURE domain", None), Column("sure_pixels_scored", "share of pixels SURE scored", 2),
        Column("added_structure", "added edges", None),
        Column("added_edge_pixels", "added edge pixels", 0), Column("seconds_per_megapixel", "seconds per megapixel", 3),
    ]
    detail_columns = [
        Column("image", "image", None), Column("region", "region", None), Column("method", "method", None),
        Column("parameter_choice", "parameter choice", None), Column("contrast_retention", "contrast retention"),
        Column("cnr_output", "contrast-to-noise (output)"), Column("cnr_noisy", "contrast-to-noise (noisy)"),
        Column("noisy_contrast_in_standard_errors", "noisy contrast / its standard error", 1),
    ]
    notes = [
        f"Classical parameters: {GROUND_TRUTH_LABEL if ground_truth else CALIBRATED_LABEL}"
        + (" (grid search on PSNR against the clean images: not reproducible without them)." if ground_truth
           else " (Batson and Royer 2019)."),
        "Ranking: " + ("mean PSNR against the clean images." if ground_truth else
                       "SURE's estimated PSNR (Monte-Carlo SURE, Ramani, Blu and Unser 2008) to 0.1 dB, then the "
                       "J-invariant loss."),
        "SURE's estimated PSNR depends on the estimated noise level; its standard error (per-image table) is the "
        "part of the error no method can know, the same for every method on an image, so the order is finer "
        "than it. For Poisson-Gaussian noise it is a PSNR in the Anscombe domain: for ranking, not comparable "
        "with the PSNR column.",
        f"J-invariant loss: on a centre crop of {options.tuning_crop} pixels"
        + (", 4 of the 16 pixel grids." if options.quick else ", all 16 pixel grids.")
        + " Lower is better; it is the error of the method made J-invariant (no pixel sees its own noisy value) "
        "plus the noise variance, on average.",
        f"Contrast retention summaries use the regions whose noisy contrast is at least {CLEAR_CONTRAST:g} of its "
        "standard errors (region table, last column); fainter regions are listed but not summarised.",
        "Noise left: MAD noise estimate of the output over that of the input. Residual autocorrelation and "
        "residual-output correlation: near 0 when what was removed looks like noise.",
        "Seconds per megapixel: one run on the whole image on this machine (classical filters single-threaded, "
        "ONNX models with the stated threads); a shared machine makes absolute figures noisy.",
    ]
    if options.quick:
        notes.append("Quick settings: at most three points of each parameter grid, small crops.")
    return ReportContent(
        title="Denoiser comparison",
        settings=settings,
        findings=findings,
        ranking_columns=ranking_columns,
        ranking=ranking,
        row_columns=row_columns,
        rows=rows,
        detail_columns=detail_columns,
        details=details,
        plot_quality_key="psnr" if ground_truth else "sure_psnr",
        plot_quality_label="PSNR (dB)" if ground_truth else "SURE estimated PSNR (dB)",
        panels=panels,
        notes=notes,
        size_plot=options.size_plot,
    )
