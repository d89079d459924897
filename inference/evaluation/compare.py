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
from grainwright.inference.baselines.registry import get_baseline
from grainwright.inference.common.errors import InputError
from grainwright.inference.evaluation.calibration import (
    CALIBRATED_LABEL,
    GROUND_TRUTH_LABEL,
    calibrate,
    j_invariant_loss,
    tune_on_ground_truth,
)
from grainwright.inference.evaluation.compare_inputs import (
    MIN_SIDE,
    NOISE_CHOICES,
    CompareOptions,
    ImageSet,
    MethodSpec,
    NoiseEstimate,
    check_image_set,
    estimate_noise,
    match_images,
    parse_methods,
    with_ensemble_rows,
)
from grainwright.inference.evaluation.compare_summary import findings_of, rank_methods, report_content
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
from grainwright.inference.evaluation.report import CropSet, ImagePanels, write_report
from grainwright.inference.evaluation.sure import (
    SureEstimate,
    sure_mse,
    sure_mse_stabilized,
    unclipped_mask,
)
from grainwright.inference.images import transforms
from grainwright.inference.images.crops import centre_crop
from grainwright.inference.images.imageio import read_image
from grainwright.inference.images.normalization import Normalization
from grainwright.inference.runtime.runner import OnnxDenoiser

# The options, methods list, image set and noise estimate live in compare_inputs; callers import them from here.
__all__ = ["MIN_SIDE", "NOISE_CHOICES", "CompareOptions", "CompareResult", "ImageSet", "MethodSpec", "NoiseEstimate",
           "estimate_noise", "match_images", "parse_methods", "run_comparison", "sure_figure"]

LEARNED_LABEL = "learned (ONNX model as exported)"
Denoise = Callable[[np.ndarray], np.ndarray]


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
        self.denoiser = OnnxDenoiser(spec.path, threads=threads, ensemble=spec.ensemble)
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
    specs = with_ensemble_rows(parse_methods(methods), options.ensemble_rows)
    images = match_images(noisy_dir, clean_dir)
    regions_file = load_regions(rois) if rois is not None else {}
    out_dir = Path(out_dir)
    if out_dir.exists() and (not out_dir.is_dir() or any(out_dir.iterdir())) and not options.overwrite:
        raise InputError(out_dir, "report folder exists and is not empty (not overwritten without --overwrite)")

    normalization, channels = check_image_set(images)
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
        regions = _regions_for(path, noisy, noise, regions_file, rois, options)
        image_rows, image_details, panel = _compare_image(
            path.name, noisy, clean, noise, regions, specs, learned, normalization, options,
            with_panel=index < options.panel_images, say=say)
        rows += image_rows
        details += image_details
        panels += [panel] if panel is not None else []

    ranking = rank_methods(rows, specs, ground_truth)
    findings = findings_of(ranking, details, ground_truth)
    settings = _settings(noisy_dir, len(images.noisy), clean_dir if ground_truth else None, specs, normalization,
                         noise_texts, rois, options, seconds=time.perf_counter() - started)
    content = report_content(settings, findings, ranking, rows, details, panels, ground_truth, options)
    write_report(out_dir, content, overwrite=options.overwrite)
    say(f"report: {out_dir / 'index.html'}")
    return CompareResult(out_dir, ground_truth, ranking, rows, details, findings, settings)


def _settings(noisy_dir: str | Path, count: int, clean_dir: str | Path | None, specs: list[MethodSpec],
              normalization: Normalization, noise_texts: list[str], rois: str | Path | None, options: CompareOptions,
              *, seconds: float) -> dict[str, Any]:
    """The report's settings table."""
    return {
        "noisy images": f"{noisy_dir} ({count} image(s))",
        "clean images": str(clean_dir) if clean_dir is not None else "none (ranking without ground truth)",
        "methods": ", ".join(spec.label for spec in specs),
        "classical parameters": GROUND_TRUTH_LABEL if clean_dir is not None else CALIBRATED_LABEL,
        "working range": f"{normalization.low:g} to {normalization.high:g} native "
                         f"({normalization.bit_depth or 'float'} bit) maps to 0 to 1; PSNR peak = that range",
        "noise": "; ".join(noise_texts),
        "regions": f"from {rois}" if rois else "found automatically",
        "quick": options.quick,
        "ONNX Runtime threads": options.threads or "all cores",
        "total time (s)": round(seconds, 1),
    }


def _compare_image(name: str, noisy: np.ndarray, clean: np.ndarray | None, noise: NoiseEstimate,
                   regions: list[Region], specs: list[MethodSpec], learned: dict[str, _LearnedMethod],
                   normalization: Normalization, options: CompareOptions, *, with_panel: bool,
                   say: Callable[[str], Any]) -> tuple[list[dict[str, Any]], list[dict[str, Any]], ImagePanels | None]:
    """Every method on one working-range image: its rows (one per method), its region rows (one per region and
    method) and, ``with_panel``, the report's panels of crops and maps."""
    native_sigma = noise.channel_sigma * normalization.full_range  # what the runtime's own estimate gives
    rows: list[dict[str, Any]] = []
    details: list[dict[str, Any]] = []
    outputs: dict[str, np.ndarray] = {}
    structure_maps: dict[str, np.ndarray] = {}
    added_maps: dict[str, np.ndarray] = {}
    for spec in specs:
        say(f"    {spec.label}")
        row, output, maps = _run_and_score(spec, learned, noisy, clean, noise, native_sigma, normalization, options)
        rows.append({"image": name, **row})
        for region in regions:
            details.append(_region_row(name, region, noisy, output, noise, row))
        if with_panel:
            outputs[spec.label] = output
            structure_maps[spec.label] = _reduce(maps["structure"])
            added_maps[spec.label] = _reduce(maps["added"].astype(np.float32)) > 0.2
    if not with_panel:
        return rows, details, None
    panel = _panels(name, noisy, clean, outputs, regions, noise, options)
    panel.structure_maps.update(structure_maps)
    panel.added_maps.update(added_maps)
    return rows, details, panel


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
        row["parameter_choice"] = LEARNED_LABEL if spec.ensemble == 1 else f"{LEARNED_LABEL}, {spec.ensemble}-fold " \
            "flip/rotation ensemble"
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
