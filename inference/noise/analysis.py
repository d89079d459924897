"""The analysis behind ``grainwright inspect``: per-image facts and noise, a folder summary, and a
plain-language recommendation of training scheme, transform and corrections.

Torch-free. The folder layouts recognised are the trainer's (see docs/data-layouts.md): ``clean/`` +
``noisy/`` (clean/noisy pairs), ``noisy-a/`` + ``noisy-b/`` (two noisy shots), ``noisy-stacks/`` (multi-frame
files of a static scene), ``clean/`` alone, ``noisy/`` alone or images directly in the folder.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from grainwright.inference.common.errors import GrainwrightError, InputError
from grainwright.inference.images.crops import centre_crop
from grainwright.inference.images.imageio import find_images, read_centre_of_file
from grainwright.inference.images.layouts import LAYOUT_FOLDERS
from grainwright.inference.images.normalization import Normalization
from grainwright.inference.noise.estimation import (
    MIN_ANALYSED_SIDE,
    NoiseAnalysis,
    analyse_noise,
    estimate_sigma,
    pool_poisson_gaussian,
)
from grainwright.inference.noise.models import (
    GammaSpeckle,
    GaussianNoise,
    NoiseModel,
    PoissonGaussianNoise,
)

# Images larger than this are analysed on their central crop, to bound time and memory; a tiled or striped TIFF
# or a .npy file is read only there, so it may be of any size (other formats meet the limits of images.limits).
MAX_ANALYSED_SIDE = 2048
# Below this noise level (percent of the full range) an image is treated as clean.
CLEAN_SIGMA_PERCENT = 0.2


@dataclass
class ImageReport:
    """What ``inspect`` found for one file."""

    path: str
    role: str
    frames: int
    shape: list[int]
    dtype: str
    bit_depth: int | None
    low: float
    high: float
    minimum: float
    maximum: float
    analysis: NoiseAnalysis
    static_stack: bool | None = None
    pair_sigma: list[float] | None = None
    analysed_shape: list[int] | None = None  # the central crop analysed (and whose values are given)

    def to_dict(self) -> dict[str, Any]:
        data = {k: v for k, v in self.__dict__.items() if k != "analysis"}
        data["noise"] = self.analysis.to_dict()
        return data


@dataclass
class InspectionReport:
    layout: str
    images: list[ImageReport] = field(default_factory=list)
    failures: list[dict[str, str]] = field(default_factory=list)
    summary: dict[str, Any] = field(default_factory=dict)
    recommendation: dict[str, Any] = field(default_factory=dict)
    model: NoiseModel | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "layout": self.layout,
            "images": [image.to_dict() for image in self.images],
            "failures": self.failures,
            "summary": self.summary,
            "noise_model": None if self.model is None else self.model.to_dict(),
            "recommendation": self.recommendation,
        }


# ------------------------------------------------------------------------------------------- gathering
def find_layout(paths: list[str | Path], recursive: bool = False) -> tuple[str, dict[str, list[Path]]]:
    """Decide the data layout and list files per role (``clean``, ``noisy``, ``noisy_b``, ``stacks``).

    One folder holding the trainer's sub-folders gives that layout; anything else (files, globs, plain
    folders) counts as single noisy images, where multi-frame files are checked for a static scene.
    """
    if len(paths) == 1 and Path(paths[0]).is_dir():
        root = Path(paths[0])
        for layout, folders in LAYOUT_FOLDERS.items():
            if all((root / folder).is_dir() for folder in folders):
                files = {folder: find_images(root / folder, recursive=recursive) for folder in folders}
                if layout == "clean-noisy":
                    return layout, {"noisy": files["noisy"], "clean": _matched(files["noisy"], files["clean"])}
                if layout == "noisy-pairs":
                    return layout, {"noisy": files["noisy-a"], "noisy_b": _matched(files["noisy-a"], files["noisy-b"])}
                if layout == "noisy-stacks":
                    return layout, {"stacks": files["noisy-stacks"]}
                if layout == "clean-only":
                    return layout, {"clean_only": files["clean"]}
                return layout, {"noisy": files["noisy"]}
    return "noisy-only", {"noisy": find_images(paths, recursive=recursive)}


def _matched(first: list[Path], second: list[Path]) -> list[Path | None]:
    """For each file of ``first``, the file of ``second`` with the same name stem (or None)."""
    by_stem = {path.stem: path for path in second}
    return [by_stem.get(path.stem) for path in first]


def _is_static(first: np.ndarray, second: np.ndarray) -> bool:
    """Two frames show the same static scene when their difference is noise alone: its plain RMS (which
    counts moved edges) is within 25% of its wavelet-MAD noise level (which ignores them)."""
    difference = second.astype(np.float64) - first.astype(np.float64)
    difference -= difference.mean(axis=(0, 1), keepdims=True)  # a global brightness change is not motion
    noise = float(np.mean(estimate_sigma(difference)))
    rms = float(np.sqrt(np.mean(difference**2)))
    return noise > 0 and rms <= 1.25 * noise


def inspect_file(path: Path, role: str, bit_depth: int | None = None, partner: Path | None = None,
                 nonfinite: str = "error") -> ImageReport:
    """Read one file's central crop (first two frames) and analyse its first frame (and, for a partner file or
    a stack, the pair). Range, bit depth and values come from the crop."""
    crop = read_centre_of_file(path, MAX_ANALYSED_SIDE, frames=2, nonfinite=nonfinite)
    height, width, _ = crop.shape
    if min(height, width) < MIN_ANALYSED_SIDE:
        raise InputError(path, f"{height} x {width} pixels is too small to analyse its noise "
                               f"(at least {MIN_ANALYSED_SIDE} x {MIN_ANALYSED_SIDE})")
    frames = crop.frames
    norm = Normalization.for_array(frames, bit_depth=bit_depth)
    image = frames[0]
    analysis = analyse_noise(image, low=norm.low, high=norm.high)
    report = ImageReport(
        path=str(path), role=role, frames=crop.count, shape=list(crop.shape),
        dtype=frames.dtype.name, bit_depth=norm.bit_depth, low=norm.low, high=norm.high,
        minimum=float(frames.min()), maximum=float(frames.max()), analysis=analysis,
        analysed_shape=list(image.shape) if image.shape != crop.shape else None,
    )
    if crop.count > 1:
        report.static_stack = _is_static(image, frames[1])
    if partner is not None:
        other = read_centre_of_file(partner, MAX_ANALYSED_SIDE, frames=1, nonfinite=nonfinite)
        if other.shape != crop.shape:
            raise InputError(partner, f"shape {other.shape} does not match {path} {crop.shape}")
        difference = other.frames[0].astype(np.float64) - image.astype(np.float64)
        spread = difference.reshape(-1, difference.shape[-1]).std(axis=0)
        # noisy minus clean is the noise itself; the difference of two noisy shots has twice its variance.
        report.pair_sigma = [float(s) for s in (spread if role == "noisy+clean" else spread / np.sqrt(2.0))]
    return report


def inspect_paths(paths: list[str | Path], recursive: bool = False, bit_depth: int | None = None,
                  nonfinite: str = "error") -> InspectionReport:
    """Inspect every image found under ``paths``; unreadable files are recorded in ``failures`` and skipped."""
    layout, files = find_layout(list(paths), recursive=recursive)
    report = InspectionReport(layout=layout)
    jobs: list[tuple[Path, str, Path | None]] = []
    if "clean" in files:
        jobs = [(n, "noisy+clean", c) for n, c in zip(files["noisy"], files["clean"])]
    elif "noisy_b" in files:
        jobs = [(a, "noisy+noisy", b) for a, b in zip(files["noisy"], files["noisy_b"])]
    elif "stacks" in files:
        jobs = [(s, "stack", None) for s in files["stacks"]]
    elif "clean_only" in files:
        jobs = [(c, "clean", None) for c in files["clean_only"]]
    else:
        jobs = [(n, "noisy", None) for n in files["noisy"]]
    for path, role, partner in jobs:
        if role in ("noisy+clean", "noisy+noisy") and partner is None:
            report.failures.append({"path": str(path), "error": f"{path}: no file with the same name to pair with"})
            continue
        try:
            report.images.append(inspect_file(path, role, bit_depth=bit_depth, partner=partner, nonfinite=nonfinite))
        except GrainwrightError as error:
            report.failures.append({"path": str(path), "error": str(error)})
    if report.images:
        report.summary, report.model = summarise(report.images)
        report.recommendation = recommend(report.layout, report.images, report.summary)
        if len(paths) == 1 and Path(paths[0]).is_dir():
            report.recommendation["command"] = report.recommendation["command"].replace("DIR", str(paths[0]))
    return report


# ------------------------------------------------------------------------------------ summary and advice
# The variance-stabilising transform each noise kind calls for (none for additive Gaussian noise).
TRANSFORM_FOR_KIND = {"poisson-gaussian": "anscombe", "speckle-gamma": "log"}


@dataclass
class SetNoise:
    """What the noise analyses of a set of images say together (what ``inspect`` reports and ``train`` follows).

    Attributes
    ----------
    kind : str
        ``"gaussian"``, ``"poisson-gaussian"`` or ``"speckle-gamma"``: speckle when most images say so
        (``"+impulse"`` set aside, so that impulses flagged on some images do not split the vote); otherwise the
        line fitted to the signal levels of all the Gaussian and Poisson-Gaussian images together decides
        whether the noise grows with the signal.
    model : NoiseModel
        One model for the set, working units: for Poisson-Gaussian noise one line fitted to the signal levels
        of all the images of that kind together (``pool_poisson_gaussian``), otherwise medians over them.
    confident : bool
        Most images of that kind have a fit trusted enough to train on (no impulses, no correlation, enough
        flat regions over a wide signal range).
    transform : str or None
        ``"anscombe"``, ``"log"`` or None, from the kind.
    images, kind_images, confident_images : int
        Images analysed, of them of the main kind (Gaussian and Poisson-Gaussian count as one), and of those
        with a confident fit.
    sigma_working : float
        Median wavelet-MAD noise level over all images, working units.
    flags : dict
        Images with each flag raised: ``impulse``, ``banding``, ``correlation``; and ``signal_dependent``.
    """

    kind: str
    model: NoiseModel
    confident: bool
    transform: str | None
    images: int
    kind_images: int
    confident_images: int
    sigma_working: float
    flags: dict[str, int]

    def describe(self) -> str:
        """One phrase: what was found and how sure, e.g. ``speckle-gamma (looks=3.7) on 10 of 12 images, fit
        confident on 4 of them; impulses flagged on 6``."""
        text = (f"{self.kind} ({self.model.describe()}) on {self.kind_images} of {self.images} image(s), fit "
                f"confident on {self.confident_images} of them")
        raised = [f"{'impulses' if name == 'impulse' else name} flagged on {count}"
                  for name, count in self.flags.items() if count and name != "signal_dependent"]
        return text + ("; " + ", ".join(raised) if raised else "")


LINE_KINDS = ("gaussian", "poisson-gaussian")  # the kinds a variance-versus-signal line tells apart


def summarise_noise(analyses: list[NoiseAnalysis]) -> SetNoise:
    """Combine per-image analyses into one verdict for the set (shared by ``inspect`` and ``train``)."""
    if not analyses:
        raise ValueError("no noise analyses to summarise")
    kinds = [a.kind.split("+")[0] for a in analyses]
    # Gaussian and Poisson-Gaussian images vote together: on one image a narrow signal range can hide a real
    # gain, so the line fitted to the levels of all of them decides between the two.
    family = ["line" if kind in LINE_KINDS else kind for kind in kinds]
    main_family = max(sorted(set(family)), key=family.count)
    chosen = [a for a, f in zip(analyses, family) if f == main_family]
    main_kind = main_family
    sigma_working = float(np.median([np.mean(a.sigma) / (a.high - a.low) for a in analyses]))
    if main_family == "line":
        pooled = pool_poisson_gaussian([a.fit for a in chosen], [(a.low, a.high) for a in chosen])
        main_kind = "poisson-gaussian" if pooled.signal_dependent else "gaussian"
    if main_kind == "poisson-gaussian":
        model: NoiseModel = PoissonGaussianNoise(gain=pooled.gain, read=pooled.read)
    elif main_kind == "speckle-gamma":
        model = GammaSpeckle(looks=float(np.median([a.model.components[0].looks if hasattr(a.model, "components")
                                                    else a.model.looks for a in chosen])))
    else:
        model = GaussianNoise(sigma=sigma_working)
    confident_images = sum(a.confident for a in chosen)
    return SetNoise(
        kind=main_kind, model=model, confident=confident_images * 2 > len(chosen),
        transform=TRANSFORM_FOR_KIND.get(main_kind), images=len(analyses), kind_images=len(chosen),
        confident_images=confident_images, sigma_working=sigma_working,
        flags={"impulse": sum(a.impulse.flagged for a in analyses), "banding": sum(a.banding.flagged for a in analyses),
               "correlation": sum(a.correlation.flagged for a in analyses),
               "signal_dependent": sum(a.signal_dependent for a in analyses)},
    )


def analyse_images(images: list[np.ndarray], low: float, high: float) -> tuple[list[NoiseAnalysis], SetNoise]:
    """Analyse each ``(H, W, C)`` native image as ``inspect`` does (central crop of at most ``MAX_ANALYSED_SIDE``)
    and summarise the set; images too small to analyse are skipped (ValueError when none is left)."""
    analyses = [analyse_noise(centre_crop(image, MAX_ANALYSED_SIDE), low=low, high=high) for image in images
                if min(image.shape[:2]) >= MIN_ANALYSED_SIDE]
    if not analyses:
        raise ValueError(f"no image is large enough to analyse its noise (at least {MIN_ANALYSED_SIDE} x "
                         f"{MIN_ANALYSED_SIDE} pixels)")
    return analyses, summarise_noise(analyses)


def summarise(images: list[ImageReport]) -> tuple[dict[str, Any], NoiseModel]:
    """Folder figures and one noise model for the whole set (working units; see ``summarise_noise``)."""
    found = summarise_noise([image.analysis for image in images])
    summary = {
        "images": len(images),
        "dtypes": sorted({image.dtype for image in images}),
        "bit_depths": sorted({image.bit_depth for image in images if image.bit_depth is not None}),
        "shapes": sorted({tuple(image.shape) for image in images}),
        "median_sigma_percent": 100.0 * found.sigma_working,
        "noise_kind": found.kind,
        "confident_images": found.confident_images,
        "confident": found.confident,
        "signal_dependent_images": found.flags["signal_dependent"],
        "impulse_images": found.flags["impulse"],
        "banding_images": found.flags["banding"],
        "correlated_images": found.flags["correlation"],
        "static_stacks": sum(bool(image.static_stack) for image in images),
        "stacks": sum(image.frames > 1 for image in images),
        "looks_clean": 100.0 * found.sigma_working < CLEAN_SIGMA_PERCENT,
    }
    summary["shapes"] = [list(shape) for shape in summary["shapes"]]
    return summary, found.model


def recommend(layout: str, images: list[ImageReport], summary: dict[str, Any]) -> dict[str, Any]:
    """Training scheme, transform and corrections for the data found, each with its reason in plain words."""
    kind = summary["noise_kind"]
    transform = TRANSFORM_FOR_KIND.get(kind)
    cautions: list[str] = []
    if layout == "clean-noisy":
        scheme, why = "supervised", "clean/noisy pairs were found: train on them directly"
    elif layout in ("noisy-pairs",) or (summary["stacks"] and summary["static_stacks"] == summary["images"]):
        scheme, why = "noise2noise", (
            "two independent noisy shots of each scene were found: Noise2Noise learns from them as if one were "
            "clean"
        )
    elif layout == "clean-only" or summary["looks_clean"]:
        scheme = "supervised"
        why = ("the images look clean (noise below {:.1f}% of the range): train supervised with fresh synthetic "
               "noise from a noise.toml (write it from noisy images of the same sensor with "
               "'grainwright inspect NOISY --save-noise noise.toml', or by hand)").format(CLEAN_SIGMA_PERCENT)
    elif summary["confident"] and not summary["correlated_images"] and not summary["impulse_images"]:
        scheme = "recorrupted"
        why = ("single noisy images whose noise model is estimated confidently: Recorrupted-to-Recorrupted "
               "trains on every pixel with noise drawn from that model")
    else:
        scheme = "neighbor2neighbor"
        why = ("single noisy images, and the noise model is not certain enough for Recorrupted-to-Recorrupted: "
               "Neighbor2Neighbor needs only pixel-independent, zero-mean noise")
    if layout == "noisy-stacks" and summary["static_stacks"] < summary["images"]:
        cautions.append("some stacks do not look like a static scene (frames differ by more than noise); "
                        "Noise2Noise on them would learn to blur motion")
    corrections = []
    if summary["banding_images"]:
        corrections.append("fixed-pattern correction (row/column banding found): the trainer applies it when "
                           "the flag is raised; Noise2Noise cannot remove a pattern present in both shots")
    if summary["impulse_images"]:
        corrections.append("impulse noise found (isolated spikes): mask or median-filter those pixels first")
    if summary["correlated_images"]:
        cautions.append("noise is correlated between neighbouring pixels (demosaicing, sharpening, compression "
                        "or binning): self-supervised schemes assume pixel-independent noise and will leave "
                        "part of it; pairs (supervised or Noise2Noise) or raw data avoid this")
    if transform == "anscombe":
        transform_why = "noise grows with the signal: the generalized Anscombe transform makes it unit-variance Gaussian"
    elif transform == "log":
        transform_why = "multiplicative speckle: the log transform makes it additive with constant variance"
    else:
        transform_why = "noise level does not depend on the signal: no transform needed"
    return {
        "scheme": scheme,
        "why": why,
        "transform": transform,
        "transform_why": transform_why,
        "corrections": corrections,
        "cautions": cautions,
        "command": f"grainwright train --data DIR --scheme {scheme}",
    }


# ------------------------------------------------------------------------------------------------ text
def format_text(report: InspectionReport) -> str:
    """The human-readable report."""
    lines: list[str] = []
    for image in report.images:
        a = image.analysis
        depth = f"{image.bit_depth}-bit" if image.bit_depth is not None else "float"
        frames = f", {image.frames} frames" if image.frames > 1 else ""
        lines.append(f"{image.path}  [{image.role}]")
        crop = (f" in the central {image.analysed_shape[0]} x {image.analysed_shape[1]} analysed"
                if image.analysed_shape else "")
        lines.append(
            f"  image     {'x'.join(str(s) for s in image.shape)} {image.dtype}, {depth} "
            f"(full range {image.low:g}..{image.high:g}), values {image.minimum:g}..{image.maximum:g}{crop}{frames}"
        )
        sigmas = ", ".join(f"{s:.3g}" for s in a.sigma)
        percents = ", ".join(f"{p:.2f}%" for p in a.sigma_percent)
        lines.append(f"  noise     sigma {sigmas} ({percents} of range), wavelet MAD")
        fit = a.fit
        lines.append(
            f"  model     variance = {fit.gain:.4g} x signal + {fit.intercept:.4g} (native units; read "
            f"{fit.read:.3g}), {'confident' if fit.confident else 'uncertain'} fit over {len(fit.levels)} levels; "
            f"signal-dependent: {'yes' if fit.signal_dependent else 'no'}"
        )
        lines.append(
            f"  flags     impulses {_yes(a.impulse.flagged)} ({100 * a.impulse.fraction:.3f}% spikes), banding "
            f"{_yes(a.banding.flagged)} (rows {a.banding.row_ratio:.1f}x, columns {a.banding.column_ratio:.1f}x "
            f"noise), correlation {_yes(a.correlation.flagged)} ({a.correlation.horizontal:.2f} horizontal, "
            f"{a.correlation.vertical:.2f} vertical)"
        )
        lines.append(f"  suggests  {a.model.describe()} in working units, transform: {a.transform or 'none'}")
        if image.static_stack is not None:
            lines.append(f"  stack     consecutive frames {'show a static scene' if image.static_stack else 'differ by more than noise'}")
        if image.pair_sigma is not None:
            what = "noisy minus clean" if image.role == "noisy+clean" else "difference of the two shots / sqrt(2)"
            lines.append(f"  pair      measured noise sigma {', '.join(f'{s:.3g}' for s in image.pair_sigma)} ({what})")
    for failure in report.failures:
        lines.append(f"FAILED {failure['error']}")
    if report.images:
        s, r = report.summary, report.recommendation
        lines.append("")
        lines.append(f"Summary: {s['images']} image(s), layout '{report.layout}', {', '.join(s['dtypes'])}, "
                     f"median noise {s['median_sigma_percent']:.2f}% of range, mostly {s['noise_kind']} "
                     f"({s['confident_images']} confident), flags: impulses {s['impulse_images']}, banding "
                     f"{s['banding_images']}, correlation {s['correlated_images']}")
        lines.append(f"Noise model for the set: {report.model.describe()} (working units: fractions of the range)")
        lines.append(f"Recommended scheme: {r['scheme']} - {r['why']}")
        lines.append(f"Transform: {r['transform'] or 'none'} - {r['transform_why']}")
        for item in r["corrections"]:
            lines.append(f"Correction: {item}")
        for item in r["cautions"]:
            lines.append(f"Caution: {item}")
        lines.append(f"Next: {r['command']}")
    return "\n".join(lines)


def _yes(flag: bool) -> str:
    return "YES" if flag else "no"
