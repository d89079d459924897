"""``grainwright train``: from a config and a data folder to a run folder.

Everything that can fail on bad input (config, layout, images, scheme/layout fit, model) is checked before the
run folder exists; the folder is then created under a temporary name holding ``config.toml`` and ``noise.toml``
and renamed into place, and ``checkpoints/last.pt`` is written before the first step. A failed start leaves
nothing behind, and a run that stops at any later point can be resumed with ``--resume``.
"""
from __future__ import annotations

import datetime
import fnmatch
import math
import os
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import torch

from grainwright.inference.common.atomic import atomic_folder, remove_stale_temporaries, write_json_atomic
from grainwright.inference.common.errors import (
    ConfigError,
    GrainwrightError,
    InputError,
)
from grainwright.inference.images.alignment import ALIGN_REVISIONS, recorded_revision
from grainwright.models.checkpoint import RunFolder, data_fingerprint, load_checkpoint
from grainwright.models.registry import build_model, hyper_defaults
from grainwright.trainer.config import load_config, validate
from grainwright.trainer.data import (
    LAYOUT_TEXT,
    Layout,
    PatchSource,
    detect_layout,
    read_layout,
    split_by_image,
    split_single_image,
    stack_windows,
)
from grainwright.trainer.loop import TrainingSetup, fastest_step, train
from grainwright.trainer.schemes.recorrupted_stack import frame_noise_correlation
from grainwright.trainer.schemes.registry import (
    GAUSSIAN_IN_WORKING_DOMAIN,
    check_scheme_fits,
    choose_scheme,
    choose_stack_scheme,
    scheme_class,
)
from grainwright.trainer.start import (
    EARLIER_RUN,
    RANDOM,
    check_start_weights,
    fine_tuning_schedule,
    fit_start_config,
    heldout_frames,
    resolve_start,
)

# Noisy images analysed for the noise model and the flags (evenly spaced over the list), to bound the start-up time.
MAX_ANALYSED = 12


def physical_cores() -> int:
    """Physical CPU cores (hyper-threads not counted) on Linux, else the logical count."""
    try:
        pairs = set()
        block: dict[str, str] = {}
        for line in Path("/proc/cpuinfo").read_text().splitlines() + [""]:
            if ":" in line:
                key, value = (part.strip() for part in line.split(":", 1))
                block[key] = value
            elif block:
                pairs.add((block.get("physical id"), block.get("core id")))
                block = {}
        if pairs and (None, None) not in pairs:
            return len(pairs)
    except OSError:
        pass
    return os.cpu_count() or 1


def _noise_description(config: dict[str, Any], root: Path) -> tuple[Any, Path | None]:
    from grainwright.inference.noise.models import load_noise

    given = config["noise"]["file"]
    path = Path(given) if given else root / "noise.toml"
    if given and not path.is_file():
        raise InputError(path, "noise description not found (noise.file)")
    return (load_noise(path), path) if path.is_file() else (None, None)


@dataclass
class NoiseFindings:
    """What the noise analysis (the one ``inspect`` runs) found on up to ``MAX_ANALYSED`` noisy training images.

    ``per_image_sigma``: wavelet-MAD sigma per image and channel, native units; ``found``: the verdict for the
    set (kind, model in working units, confidence, transform; ``grainwright.inference.noise.analysis.SetNoise``);
    ``flags``: the banding/correlation flags raised on most images.
    """

    per_image_sigma: np.ndarray
    found: Any
    flags: list[str]

    @property
    def kind(self) -> str:
        return self.found.kind

    @property
    def confident(self) -> bool:
        return self.found.confident


def _analyse_noise(images: list[np.ndarray], normalization: Any) -> NoiseFindings | None:
    from grainwright.inference.noise.analysis import analyse_images

    step = max(1, len(images) // MAX_ANALYSED)
    try:
        analyses, found = analyse_images(images[::step][:MAX_ANALYSED], normalization.low, normalization.high)
    except ValueError:  # every image too small to analyse
        return None
    flags = [name for name in ("banding", "correlation") if found.flags[name] > found.images / 2]
    return NoiseFindings(np.array([analysis.sigma for analysis in analyses]), found, flags)


def _correct_fixed_pattern(images: list[dict[str, np.ndarray]]) -> None:
    """The row/column correction of every noisy image, frame by frame for whole stacks ``(N, H, W, C)``."""
    from grainwright.inference.noise.estimation import correct_fixed_pattern

    for item in images:
        for role, array in item.items():
            if role != "clean":
                item[role] = (np.stack([correct_fixed_pattern(frame) for frame in array]) if array.ndim == 4
                              else correct_fixed_pattern(array))


@dataclass
class _TrainingImages:
    """The training data as read: layout, images (native units, one dict of roles per sample; a multi-frame
    model's whole stacks ``{"noisy": (N, H, W, C)}``), the file each came from, their range, the noise
    description given or estimated, and what the analysis of the noisy images (frames) found."""

    layout: Layout
    images: list[dict[str, np.ndarray]]
    sources: list[Path]
    normalization: Any
    channels: int
    noise: Any
    noise_path: Path | None
    findings: NoiseFindings | None


def _read_training_images(config: dict[str, Any], announce: Callable[[str], None]) -> _TrainingImages:
    """Stage 1: find the layout, read the images and the noise description, fit the normalization to the images'
    range and analyse the noise of the noisy ones."""
    from grainwright.inference.images.normalization import Normalization

    data_cfg = config["data"]
    layout = detect_layout(data_cfg["folder"])
    frames = stack_frames(config)
    if frames > 1 and layout.name != "noisy-stacks":
        raise ConfigError(f"model.name: '{config['model']['name']}' reads {frames} frames and trains on stacks: put "
                          f"multi-frame files or folders of numbered frames in {layout.root / 'noisy-stacks'}")
    noise, noise_path = _noise_description(config, layout.root)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        images, sources = read_layout(layout, data_cfg["patch_size"], stack_frames=frames)
    for warning in caught:
        announce(f"warning: {warning.message}")
    native = [array for item in images for array in item.values()]
    channels = native[0].shape[-1]
    stacked = np.concatenate([array.reshape(1, -1, channels) for array in native], axis=1)
    normalization = Normalization.for_array(stacked, data_cfg["bit_depth"] or None)
    del stacked
    # The noise of the noisy images (of a stack's frames): level (native units for the summary, working units for
    # the schemes), model, flags.
    noisy_native = [frame for item in images for role, array in item.items() if role != "clean"
                    for frame in (array if array.ndim == 4 else [array])]
    findings = _analyse_noise(noisy_native, normalization) if noisy_native else None
    return _TrainingImages(layout, images, sources, normalization, channels, noise, noise_path, findings)


def stack_frames(config: dict[str, Any]) -> int:
    """K of the configured architecture: the frames a multi-frame model reads per output frame (else 1)."""
    hyper = {**hyper_defaults(config["model"]["name"]), **config["model"]["hyper"]}
    return int(hyper.get("frames", 1))


def training_stack_axis(config: dict[str, Any], layout: Layout) -> str:
    """The stack axis a multi-frame model is trained along: ``data.stack_axis``, or with ``auto`` the axis
    (Z or T) that every training stack's metadata gives, else ``I`` (unstated, mixed, or folders of frames)."""
    from grainwright.inference.images.stacks import open_stack

    chosen = config["data"]["stack_axis"]
    if chosen != "auto":
        return chosen
    axes = set()
    for sample in layout.samples:
        try:
            with open_stack(sample[0]) as reader:
                axes.add(reader.info.axis)
        except GrainwrightError:
            axes.add("I")  # unreadable stacks were skipped with a warning when the images were read
    return axes.pop() if len(axes) == 1 else "I"


def _choose_scheme_and_noise(config: dict[str, Any], data: _TrainingImages, announce: Callable[[str], None]) -> str:
    """Stage 2: the scheme (``auto`` picks one from the layout and the noise known), checked against the layout;
    without a noise description, the noise model the analysis found becomes ``data.noise``. A scheme that needs
    the noise level (recorrupted, sure) on an analysis it cannot trust stops here, saying what was found and what
    to do."""
    layout, findings = data.layout, data.findings
    # Recorrupted-to-Recorrupted's independent input and target noise needs Gaussian noise in the working domain:
    # Gaussian as is, Poisson-Gaussian after the Anscombe transform; log-domain speckle is skewed.
    estimated = findings is not None and findings.confident and findings.kind in ("gaussian", "poisson-gaussian")
    name = config["scheme"]
    if name == "auto" and stack_frames(config) > 1:
        # The candidate the noise model allows; _settle_stack_scheme decides, with the frames in working units.
        name = "recorrupted-stack" if _trusted_noise(config, data) else "neighbor2neighbor-stack"
    if name == "auto":
        name, reason = choose_scheme(layout.name, data.noise is not None, estimated,
                                     None if findings is None else findings.found.describe(),
                                     None if data.noise is None else data.noise.kind)
        announce(f"scheme auto: {reason}")
    check_scheme_fits(name, layout.name)
    if layout.name == "clean-only" and data.noise is None:
        raise ConfigError(f"found {LAYOUT_TEXT['clean-only']} but no noise description: put a noise.toml in "
                          f"{layout.root} or set noise.file")
    if data.noise is None and findings is not None:
        if scheme_class(name).needs_noise_level and not findings.confident:
            raise ConfigError(
                f"scheme '{name}' needs a noise model it can trust, but the analysis of the training images "
                f"found {findings.found.describe()} (uncertain); use --scheme neighbor2neighbor (needs no noise "
                f"model), or describe the noise in a noise.toml (grainwright inspect {layout.root} --save-noise "
                f"{layout.root / 'noise.toml'})")
        data.noise = findings.found.model
        announce(f"noise from the analysis of the training images: {findings.found.describe()}"
                 + ("" if findings.confident else "; the fit is uncertain"))
    kind = None if data.noise is None else data.noise.kind
    if scheme_class(name).needs_noise_level and kind is not None and kind not in GAUSSIAN_IN_WORKING_DOMAIN:
        announce(f"caution: scheme '{name}' assumes noise that is Gaussian in the working domain, and {kind} noise "
                 "is not (on bench train's gamma speckle case recorrupted lost 2.6 dB against neighbor2neighbor); "
                 "neighbor2neighbor needs only pixel-independent, zero-mean noise")
    return name


def _trusted_noise(config: dict[str, Any], data: _TrainingImages) -> str | None:
    """The noise model ``recorrupted-stack`` may rely on, in words, or None: Gaussian or Poisson-Gaussian noise
    given in a noise description or fitted confidently by the analysis, with a working-range transform
    (``data.transform``) that makes it Gaussian (``auto``, or the one its kind needs)."""
    from grainwright.inference.noise.analysis import TRANSFORM_FOR_KIND

    if data.noise_path is not None:
        kind, origin = data.noise.kind, f"the noise description {data.noise_path.name}"
    elif data.findings is not None and data.findings.confident:
        kind, origin = data.findings.kind, "a confident fit to the training frames"
    else:
        return None
    if kind not in ("gaussian", "poisson-gaussian"):
        return None
    if config["data"]["transform"] not in ("auto", TRANSFORM_FOR_KIND.get(kind, "none")):
        return None
    return f"{kind} noise from {origin}"


def _working_range(config: dict[str, Any], scheme: str, data: _TrainingImages,
                   announce: Callable[[str], None]) -> tuple[str, str, np.ndarray | None]:
    """Stage 3: the working-range transform (the Anscombe or log transform replaces ``data.normalization``), what
    decided it, and the noise level per channel the schemes see (working units; None when unknown).

    ``auto`` follows the noise (described in a file or found by the analysis): the generalized Anscombe transform
    for Poisson-Gaussian noise, the log transform for gamma speckle, none for Gaussian noise, and none for the
    supervised scheme, whose clean targets need no stabilised noise.
    """
    transform, noise = config["data"]["transform"], data.noise
    kind = None if noise is None else noise.kind
    noisy_targets = not scheme_class(scheme).clean_targets
    needs_level = scheme_class(scheme).needs_noise_level
    decided_by = "config"
    if transform == "auto":
        from grainwright.inference.noise.analysis import TRANSFORM_FOR_KIND

        transform = TRANSFORM_FOR_KIND.get(kind, "none") if noisy_targets else "none"
        decided_by = _noise_origin(data) if noisy_targets and kind is not None else "default"
    sigma = None
    if transform in ("anscombe", "log") and data.layout.name == "clean-only":
        raise ConfigError(f"data.transform: the {transform} transform applies to real noisy data; with clean images "
                          "only the noise is synthesised in the linear range (use transform = \"none\")")
    if transform == "anscombe":
        if kind not in ("poisson", "poisson-gaussian"):
            raise ConfigError(f"data.transform = \"anscombe\" needs Poisson-Gaussian noise, but the noise is "
                              f"'{kind}' (give a noise.toml with kind \"poisson-gaussian\")")
        gain, read = noise.gain, getattr(noise, "read", 0.0)
        data.normalization = data.normalization.with_anscombe(gain, read)
        sigma = np.full(data.channels, data.normalization.working_noise_sigma(), dtype=np.float32)
        announce(f"training in the generalized-Anscombe domain (gain {gain:.4g}, read {read:.4g} of the range; "
                 f"decided by the {decided_by})")
    elif transform == "log":
        looks = _speckle_looks(noise)
        if looks is None and noisy_targets:
            raise ConfigError(f"data.transform = \"log\" with scheme '{scheme}' (noisy targets) needs gamma speckle of "
                              f"known looks to correct the log-domain bias, but the noise is '{kind}' (give a "
                              "noise.toml with kind \"speckle-gamma\", or use transform = \"none\")")
        data.normalization = data.normalization.with_log(looks=looks, noisy_targets=noisy_targets)
        level = data.normalization.working_noise_sigma()
        if level is not None:
            sigma = np.full(data.channels, level, dtype=np.float32)
        announce(f"training in the log domain (gamma speckle, {looks:.3g} looks; output unbiased by "
                 f"{data.normalization.transform.get('bias', 0.0):+.4f} in the log; decided by the {decided_by})"
                 if looks is not None else f"training in the log domain (decided by the {decided_by})")
    elif kind == "gaussian":
        sigma = np.full(data.channels, noise.sigma, dtype=np.float32)
    elif data.findings is not None:
        sigma = (np.median(data.findings.per_image_sigma, axis=0) / data.normalization.full_range).astype(np.float32)
    if needs_level and transform not in ("anscombe", "log") and kind != "gaussian":
        raise ConfigError(f"scheme '{scheme}' needs Gaussian noise in its working domain, but the noise "
                          f"{'description ' + str(data.noise_path) if data.noise_path else 'found'} is '{kind}' "
                          f"and data.transform is \"{transform}\"; set data.transform = \"auto\", give a "
                          "noise.toml, or use neighbor2neighbor")
    if needs_level and sigma is None:
        raise ConfigError(f"scheme '{scheme}' needs the noise level in the {transform} domain, which the noise "
                          f"'{kind}' does not give; give a noise.toml, or use neighbor2neighbor")
    return transform, decided_by, sigma


def _noise_origin(data: _TrainingImages) -> str:
    """Where the noise model came from, in words: the file, or the analysis of the training images."""
    if data.noise_path is not None:
        return f"noise description {data.noise_path.name}"
    return "analysis of the training images"


def _speckle_looks(noise: Any) -> float | None:
    """Number of looks of gamma speckle in ``noise`` (alone or in a mixture), else None."""
    for part in getattr(noise, "components", None) or [noise]:
        if getattr(part, "kind", None) == "speckle-gamma":
            return float(part.looks)
    return None


def _to_working(config: dict[str, Any], data: _TrainingImages,
                announce: Callable[[str], None]) -> tuple[list[dict[str, np.ndarray]], bool]:
    """Stage 4: the images in working units (``data.images`` is released), with the row/column fixed-pattern
    correction when asked or when the analysis flags banding or correlation. Returns the images and whether the
    correction was applied."""
    working = [{role: data.normalization.to_working(array) for role, array in item.items()} for item in data.images]
    data.images = []
    mode, findings = config["data"]["fixed_pattern"], data.findings
    if not (mode == "always" or (mode == "auto" and findings is not None and findings.flags)):
        return working, False
    if mode == "auto":
        announce(f"warning: the {' and '.join(findings.flags)} flag is raised on the noisy images; every "
                 "self-supervised scheme assumes zero-mean noise independent from pixel to pixel, so the "
                 "row/column fixed-pattern correction is applied before training (see docs/limits.md)")
    _correct_fixed_pattern(working)
    return working, True


def _banding_left(findings: NoiseFindings | None, corrected: bool) -> bool:
    """Whether the noise analysis flagged banding and the row/column correction did not run."""
    return findings is not None and "banding" in findings.flags and not corrected


def _settle_stack_scheme(requested: str, config: dict[str, Any], candidate: str, data: _TrainingImages,
                         working: list[dict[str, np.ndarray]], corrected: bool,
                         announce: Callable[[str], None]) -> str:
    """Stage 4b, ``auto`` with a multi-frame model: ``recorrupted-stack`` when its rule allows it (a trusted
    noise model, no banding left, noise independent between frames, measured on the whole stacks in working
    units), else ``neighbor2neighbor-stack`` (:func:`choose_stack_scheme`); announced with the reason. The
    windows are cut afterwards, at the chosen scheme's frame stride. Any other request keeps ``candidate``."""
    if requested != "auto" or stack_frames(config) == 1:
        return candidate
    trusted, banding_left = _trusted_noise(config, data), _banding_left(data.findings, corrected)
    correlation = None
    if trusted and not banding_left:
        correlation = frame_noise_correlation([item["noisy"] for item in working], stack_frames(config))
    name, reason = choose_stack_scheme(data.layout.name, trusted,
                                       None if data.findings is None else data.findings.found.describe(),
                                       banding_left, correlation, config["recorrupted"]["max_frame_correlation"])
    announce(f"scheme auto: {reason}")
    return name


def _cut_windows(config: dict[str, Any], scheme: str, working: list[dict[str, np.ndarray]],
                 sources: list[Path]) -> tuple[list[dict[str, np.ndarray]], list[Path]]:
    """Stage 4c: a multi-frame model's whole stacks cut into pairs of K-frame windows (``stack_windows``) at the
    chosen scheme's frame stride, the neighbours aligned to the centre frame as ``model.align_neighbours`` says;
    single-frame images as they are. Returns the items and the file each came from."""
    frames = stack_frames(config)
    if frames == 1:
        return working, list(sources)
    stride, alignment = scheme_class(scheme).stride_for(config), config["model"]["align_neighbours"]
    pairs = [(window, source) for item, source in zip(working, sources)
             for window in stack_windows(source, item["noisy"], frames, stride, alignment)]
    return [window for window, _ in pairs], [source for _, source in pairs]


def focus_flags(config: dict[str, Any], sources: list[Path], root: Path,
                announce: Callable[[str], None]) -> list[bool] | None:
    """Which training items come from the frames of ``data.focus_frames`` (a shell-wildcard pattern matched
    against file names), or None when the key is empty. A pattern that matches no training file is refused."""
    pattern, share = config["data"]["focus_frames"], config["data"]["focus_share"]
    if not pattern:
        return None
    flags = [fnmatch.fnmatch(source.name, pattern) for source in sources]
    matched = sorted({source.name for source, flag in zip(sources, flags) if flag})
    if not matched:
        raise ConfigError(f"data.focus_frames: no training file in {root} matches {pattern!r}")
    if all(flags):
        announce(f"focus frames: every training file matches {pattern!r}; patches drawn in proportion to size")
    else:
        announce(f"focus frames: {len(matched)} file(s) matching {pattern!r} get {share:.0%} of the training patches "
                 "(data.focus_frames, data.focus_share)")
    return flags


def stack_pairing(chosen: str, flags: list[str], corrected: bool) -> tuple[str, str]:
    """The pixel pairing of ``neighbor2neighbor-stack`` and why: ``chosen`` unless it is ``auto``; then the
    row/column-blind pairing when the noise analysis flagged banding and the row/column correction did not run
    (structure along rows or columns, possibly repeated in every frame, would reach the input through the
    target's own row or column), else the published adjacent pairing (pixel-wise noise repeated in every frame
    and noise correlated between frames stay out of its input too)."""
    if chosen != "auto":
        return chosen, f"neighbor2neighbor.stack_pairing = \"{chosen}\""
    if "banding" in flags and not corrected:
        return "row-column-blind", ("banding flagged and not corrected (data.fixed_pattern): no input pixel shares "
                                    "a row or a column with its target")
    why = "banding flagged and corrected before training" if "banding" in flags else "no banding flagged"
    return "adjacent", f"{why}: the published adjacent pairing"


def _resolve_stack_pairing(config: dict[str, Any], scheme: str, findings: NoiseFindings | None, corrected: bool,
                           announce: Callable[[str], None]) -> dict[str, Any]:
    """The config with ``neighbor2neighbor.stack_pairing`` resolved (``neighbor2neighbor-stack`` only)."""
    if scheme != "neighbor2neighbor-stack":
        return config
    table = config["neighbor2neighbor"]
    pairing, reason = stack_pairing(table["stack_pairing"], [] if findings is None else findings.flags, corrected)
    announce(f"pixel pairing: {pairing} ({reason})")
    return dict(config, neighbor2neighbor=dict(table, stack_pairing=pairing))


def _resolve_alpha(config: dict[str, Any], scheme: str, announce: Callable[[str], None]) -> dict[str, Any]:
    """The config with ``recorrupted.alpha`` resolved from ``auto`` to the scheme's default (Recorrupted-to-
    Recorrupted schemes only), so that the run's config.toml records the strength used."""
    cls, table = scheme_class(scheme), config["recorrupted"]
    if cls.default_alpha is None or table["alpha"] != "auto":
        return config
    announce(f"recorruption strength: alpha {cls.default_alpha:g} (recorrupted.alpha = \"auto\": the {scheme} "
             "default)")
    return dict(config, recorrupted=dict(table, alpha=cls.alpha_for(config)))


def _resolve_gamma(config: dict[str, Any], scheme: str, announce: Callable[[str], None]) -> dict[str, Any]:
    """The config with ``neighbor2neighbor.gamma`` resolved from ``auto`` (Neighbor2Neighbor schemes only, once
    the start is known), so that the run's config.toml records the regulariser weight used."""
    cls, table = scheme_class(scheme), config["neighbor2neighbor"]
    if cls.default_gamma is None or table["gamma"] != "auto":
        return config
    gamma = cls.gamma_for(config)
    start = "random weights" if config["start"]["weights"] == RANDOM else "trained weights"
    announce(f"consistency regulariser: gamma {gamma:g} (neighbor2neighbor.gamma = \"auto\": the {scheme} default "
             f"from {start})")
    return dict(config, neighbor2neighbor=dict(table, gamma=gamma))


def _check_data(config: dict[str, Any], scheme: str, working: list[dict[str, np.ndarray]],
                findings: NoiseFindings | None, corrected: bool, announce: Callable[[str], None]) -> dict[str, Any]:
    """The scheme's own check of the training data (``Scheme.check_data``); its figures, announced."""
    banding_left = _banding_left(findings, corrected)
    noisy = [item[role] for item in working for role in item if role != "clean"]
    figures = scheme_class(scheme).check_data(config, noisy, stack_frames(config), banding_left)
    for key, value in figures.items():
        announce(f"{key.replace('_', ' ')}: {_figure_text(value)}")
    return figures


def _figure_text(value: Any) -> str:
    """A figure of ``check_data`` in words: a number to 3 decimals, a list (or a matrix) as its numbers."""
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_figure_text(item) for item in value) + "]"
    return f"{value:.3f}"


def _split(config: dict[str, Any], working: list[dict[str, np.ndarray]], announce: Callable[[str], None]
           ) -> tuple[list[dict[str, np.ndarray]], list[dict[str, np.ndarray]], list[int]]:
    """Stage 5: training and validation images, split by whole image (``data.validation_split = "images"``;
    a single image is split into two regions) or by region of every image (``"regions"``); and the index in
    ``working`` of each training image."""
    data_cfg = config["data"]
    fraction, patch_size = data_cfg["validation_fraction"], data_cfg["patch_size"]
    if len(working) == 1 or data_cfg["validation_split"] == "regions":
        parts = [split_single_image(item, fraction, patch_size) for item in working]
        train_images, train_index = [train_part for train_part, _ in parts], list(range(len(working)))
        validation_images = [held for _, held in parts if held is not None]
        if validation_images and len(validation_images) < len(working):
            announce(f"validation: {len(working) - len(validation_images)} of {len(working)} images too small "
                     f"to keep a held-out region of {patch_size} pixels; they train whole")
    else:
        rng = np.random.default_rng(config["seed"])
        train_index, validation_index = split_by_image(len(working), fraction, rng)
        train_images, train_index = [working[i] for i in train_index], [int(i) for i in train_index]
        validation_images = [working[i] for i in validation_index]
    if not validation_images:
        announce("warning: no images held out for validation; the last state is kept as the best")
    return train_images, validation_images, train_index


def _build_model(config: dict[str, Any], scheme: str, channels: int, level_known: bool,
                 announce: Callable[[str], None]) -> tuple[torch.nn.Module, dict[str, Any]]:
    """Stage 6: the model (skip off for blind-spot schemes; the patch size a multiple of the alignment) and the
    fastest step arithmetic when asked (``auto``). ``level_known``: whether the schemes can feed a noise-level map.
    Returns the model and the config's resolved ``model`` table."""
    cls, model_cfg, patch_size = scheme_class(scheme), config["model"], config["data"]["patch_size"]
    skip = model_cfg["skip"]
    if skip == "auto":
        skip = not cls.needs_no_skip
    elif skip and cls.needs_no_skip:
        raise ConfigError(f"model.skip = true: scheme '{scheme}' needs an architecture without the input-to-output "
                          "skip (it would hand each masked pixel its own noisy value); set model.skip = false")
    hyper = {**hyper_defaults(model_cfg["name"]), **model_cfg["hyper"], "skip": skip}
    torch.manual_seed(config["seed"])
    try:
        model = build_model(model_cfg["name"], channels, **hyper)
    except (TypeError, ValueError) as error:
        raise ConfigError(f"model.hyper: {error}") from None
    multiple = cls.patch_multiple * model.alignment
    if model.stack_frames > 1 and not cls.multi_frame:
        raise ConfigError(f"scheme '{scheme}' trains single-frame models; '{model.name}' reads {model.stack_frames} "
                          "frames: use neighbor2neighbor-stack or noise2noise-stack")
    if cls.multi_frame and model.stack_frames == 1:
        raise ConfigError(f"scheme '{scheme}' trains multi-frame models; set model.name = \"unet-stack\"")
    if model.stack_frames == 1 and model_cfg["align_neighbours"] != "none":
        raise ConfigError(f"model.align_neighbours = \"{model_cfg['align_neighbours']}\": '{model.name}' reads one "
                          "frame and has no neighbours to align; set it to \"none\" or use unet-stack")
    if patch_size % multiple:
        raise ConfigError(f"data.patch_size: {patch_size} must be a multiple of {multiple} for scheme "
                          f"'{scheme}' with architecture '{model.name}'")
    if model.takes_noise_map and not level_known:
        raise ConfigError(f"model.name: '{model.name}' needs a noise level: give a noise.toml (noise.file)")
    channels_last, precision = model_cfg["channels_last"], model_cfg["precision"]
    if "auto" in (channels_last, precision):
        layouts = (False, True) if channels_last == "auto" else (channels_last,)
        precisions = ("float32", "bfloat16") if precision == "auto" else (precision,)
        (channels_last, precision), seconds = fastest_step(model, model.input_channels, patch_size,
                                                           config["data"]["batch_size"], layouts, precisions)
        measured = ", ".join(f"{'channels-last' if layout else 'standard'} {kind} {value * 1e3:.0f}"
                             for (layout, kind), value in seconds.items())
        announce(f"step arithmetic: {'channels-last' if channels_last else 'standard'} layout, {precision} "
                 f"(measured ms per step: {measured})")
    return model, dict(model_cfg, skip=skip, hyper=dict(model.hyper), channels_last=channels_last,
                       precision=precision)


def _level_known(data: _TrainingImages, sigma: np.ndarray | None) -> bool:
    """Whether a noise-level map can be fed: a level per channel, or (clean images with synthetic noise) the noise
    model's own per-pixel level."""
    if sigma is not None:
        return True
    if data.layout.name == "clean-only" and data.noise is not None:
        return data.noise.sigma_map(np.full((1, 2, 2, data.channels), 0.5, dtype=np.float32)) is not None
    return False


def _patch_source(items: list[dict[str, np.ndarray]], roles: tuple[str, ...], focus: list[bool] | None = None,
                  focus_share: float = 0.5) -> PatchSource:
    return PatchSource({role: [item[role] for item in items] for role in roles}, focus, focus_share)


def _validation_batches(config: dict[str, Any], scheme: Any, images: list[dict[str, np.ndarray]],
                        roles: tuple[str, ...]) -> list[dict[str, np.ndarray]]:
    """Stage 7: the fixed held-out batches (patches and the scheme's draws from their own seeded generator)."""
    if not images:
        return []
    fixed = np.random.default_rng([config["seed"], 1])
    patches = _patch_source(images, roles).sample(fixed, config["validation"]["patches"],
                                                  config["data"]["patch_size"], augment=False)
    size = config["data"]["batch_size"]
    batches = []
    for start in range(0, config["validation"]["patches"], size):
        chunk = {role: array[start:start + size] for role, array in patches.items()}
        batches.append(scheme.prepare(chunk, fixed))
    return batches


def prepare(config: dict[str, Any], announce: Callable[[str], None] = print,
            resuming: bool = False) -> tuple[TrainingSetup, Layout, Any]:
    """Check the config against the data and build everything the loop needs.

    Returns the setup, the layout found and the noise model used (or None). Raises ``GrainwrightError`` on any
    problem with the data or the config; nothing is written. ``resuming``: the weights come from the run's
    ``last.pt``, so the start (``start.weights``) is not loaded again.
    """
    if not resuming:
        check_start_weights(config)
    data = _read_training_images(config, announce)
    layout = data.layout
    name = _choose_scheme_and_noise(config, data, announce)
    requested, config = config["scheme"], dict(config, scheme=name)
    transform, transform_decided_by, sigma = _working_range(config, name, data, announce)
    working, fixed_pattern = _to_working(config, data, announce)
    name = _settle_stack_scheme(requested, config, name, data, working, fixed_pattern, announce)
    config = _resolve_stack_pairing(dict(config, scheme=name), name, data.findings, fixed_pattern, announce)
    config = _resolve_alpha(config, name, announce)
    data_figures = _check_data(config, name, working, data.findings, fixed_pattern, announce)
    working, sources = _cut_windows(config, name, working, data.sources)
    flags = focus_flags(config, sources, layout.root, announce)
    train_images, validation_images, train_index = _split(config, working, announce)
    train_focus = None if flags is None else [flags[index] for index in train_index]
    if train_focus is not None and not any(train_focus):
        announce("warning: every file matching data.focus_frames was held out for validation, so patches are drawn in "
                 "proportion to size; data.validation_split = \"regions\" trains on every file")
    config = fit_start_config(config, data.channels)
    model, model_table = _build_model(config, name, data.channels, _level_known(data, sigma), announce)
    config = dict(config, model=model_table)
    if resuming:
        started_from = {"weights": config["start"]["weights"]}
    else:
        started_from = resolve_start(config, name, model, data.channels, announce)
        resolved = started_from["weights"] if started_from["weights"] != EARLIER_RUN else config["start"]["weights"]
        config = dict(config, start=dict(config["start"], weights=resolved))
    config = fine_tuning_schedule(config, announce if not resuming else lambda text: None)
    config = _resolve_gamma(config, name, announce)
    scheme = scheme_class(name)(config, data.noise, sigma, level_maps=model.takes_noise_map, figures=data_figures)
    validation = _validation_batches(config, scheme, validation_images, layout.roles)
    heldout = [] if model.stack_frames > 1 else heldout_frames(validation_images, model.alignment, scheme,
                                                               config["seed"])

    training_noise = None
    if data.findings is not None:
        per_image = data.findings.per_image_sigma.mean(axis=1)
        training_noise = {"sigma_native": float(np.median(per_image)),
                          "sigma_native_range": [float(per_image.min()), float(per_image.max())],
                          "effective_bit_depth": data.normalization.bit_depth}
    channels_last, precision = model_table["channels_last"], model_table["precision"]
    summary = {"layout": layout.name, "scheme": name, "training_images": len(train_images),
               "validation_images": len(validation_images), "data_folder": str(layout.root),
               "fixed_pattern_corrected": fixed_pattern, "transform": transform,
               "transform_decided_by": transform_decided_by, "noise_kind": getattr(data.noise, "kind", None),
               "noise_decided_by": _noise_origin(data) if data.noise is not None else None,
               "noise_found": None if data.findings is None else data.findings.found.describe(),
               "parameters": model.parameter_count(), "macs_per_pixel": model.macs_per_pixel(),
               "channels_last": channels_last, "precision": precision, "stack_frames": model.stack_frames,
               "started_from": started_from}
    if model.stack_frames > 1:
        summary["stack_axis"] = training_stack_axis(config, layout)
        summary["align_neighbours"] = config["model"]["align_neighbours"]
        if summary["align_neighbours"] != "none":
            summary["align_revision"] = ALIGN_REVISIONS[summary["align_neighbours"]]
    if name == "neighbor2neighbor-stack":
        summary["stack_pairing"] = config["neighbor2neighbor"]["stack_pairing"]
    if scheme_class(name).default_alpha is not None:
        summary["recorrupted_alpha"] = config["recorrupted"]["alpha"]
    if scheme_class(name).default_gamma is not None:
        summary["neighbor2neighbor_gamma"] = config["neighbor2neighbor"]["gamma"]
    summary.update(data_figures)
    files = sorted({path for sample in layout.samples for path in sample})
    train = _patch_source(train_images, layout.roles, train_focus, config["data"]["focus_share"])
    setup = TrainingSetup(config=config, scheme=scheme, model=model, train=train,
                          validation=validation, ground_truth=layout.has_ground_truth,
                          normalization=data.normalization, channels_last=channels_last, precision=precision,
                          noise=data.noise, data_fingerprint=data_fingerprint(files),
                          training_noise=training_noise, summary=summary, heldout=heldout,
                          from_trained_weights=config["start"]["weights"] != RANDOM)
    return setup, layout, data.noise


def create_run_folder(out: Path, config: dict[str, Any], noise: Any) -> RunFolder:
    """Write ``config.toml`` and ``noise.toml`` into a temporary folder beside ``out`` and rename it into place."""
    from grainwright.inference.common.tomlio import write_toml
    from grainwright.inference.noise.models import save_noise

    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise InputError(out, "run folder exists and is not empty (choose another --out, or --resume it)")
    with atomic_folder(out) as temporary:
        write_toml(temporary / "config.toml", config, header="grainwright training config, resolved (every key)")
        if noise is not None:
            save_noise(noise, temporary / "noise.toml")
    return RunFolder(out)


def _write_summary(run: RunFolder, summary: dict[str, Any]) -> None:
    write_json_atomic(run.summary, summary, default=float)


def summary_line(summary: dict[str, Any], run: RunFolder) -> str:
    best = summary.get("best_validation") or {}
    if "psnr" in best:
        figure = f"best validation PSNR {best['psnr']:.2f} dB, SSIM {best['ssim']:.4f} at step {summary['best_step']}"
    elif "loss" in best:
        figure = f"best validation loss {best['loss']:.4g} at step {summary['best_step']}"
    else:
        figure = "no validation"
    noise = (f"noise {summary['noise_kind']} (from the {summary['noise_decided_by']})" if summary.get("noise_kind")
             else "no noise model")
    decided = f"{noise}, transform {summary.get('transform')} (decided by the {summary.get('transform_decided_by')})"
    return (f"trained {summary['scheme']} for {summary['steps']} steps in {summary['minutes']:.1f} min "
            f"({summary['patches_per_second']:.0f} patches/s, {summary['gflops_per_second']:.1f} GFLOP/s); {decided}; "
            f"{start_text(summary)}; {figure}; "
            f"stopped: {summary['stopped']}; run folder {run.root}"
            + (f" (continue with: grainwright train --resume {run.root})" if summary["stopped"] == "interrupted" else ""))


def start_text(summary: dict[str, Any]) -> str:
    """Where the run started and, after a start from trained weights, which end was kept and by what figures."""
    started = summary.get("started_from") or {}
    weights = started.get("weights")
    if weights == "starting-model":
        text = f"started from the starting model (sha256 {str(started.get('sha256'))[:12]})"
    elif weights == EARLIER_RUN:
        text = f"started from the earlier run {started.get('path')}"
    else:
        text = "started from random weights" + (f" ({started['reason']})" if started.get("reason") else "")
    selection = summary.get("selection")
    if selection:
        if selection["kept"] == "fine-tuned":
            kept = "the fine-tuned state"
        elif selection["fine_tuned"] < selection["start"]:
            kept = (f"the starting state (the fine-tuned one is better at the noise level assumed, but not for "
                    f"every variance within {selection.get('noise_margin', 0.0):.0%} of it: validation.noise_margin)")
        else:
            kept = "the starting state (fine-tuning did not help)"
        text += (f"; held-out {selection['criterion']} start {selection['start']:.4g}, fine-tuned "
                 f"{selection['fine_tuned']:.4g}: kept {kept}")
    return text


def train_command(config_path: str | None, data: str | None, *, scheme: str | None = None,
                  assignments: list[str] = (), minutes: float | None = None, steps: int | None = None,
                  out: str | None = None, resume: str | None = None, interrupt_at_step: int | None = None,
                  announce: Callable[[str], None] = print) -> tuple[dict[str, Any], RunFolder]:
    """Run ``grainwright train``; return the training summary and the run folder."""
    assignments = list(assignments)
    if steps is not None and not steps > 0:
        raise ConfigError(f"--steps must be a positive number of optimiser steps, got {steps}")
    if minutes is not None and not 0 < minutes < math.inf:
        raise ConfigError(f"--minutes must be a positive number of minutes, got {minutes}")
    if scheme is not None:
        assignments.append(f'scheme="{scheme}"')
    if steps is not None:
        assignments += [f"budget.steps={int(steps)}"]
    if minutes is not None:
        assignments += ["budget.steps=0", f"budget.minutes={float(minutes)}"]
    state = None
    if resume is not None:
        run = RunFolder(Path(resume))
        if config_path is not None:
            raise ConfigError("--resume continues with the run's own config.toml; leave out CONFIG")
        if not run.last.is_file():
            raise InputError(run.root, "nothing to resume: checkpoints/last.pt is missing")
        if data is not None:
            assignments.append(f'data.folder="{Path(data).resolve().as_posix()}"')
        config = load_config(run.config, assignments)
        for folder in (run.root, run.checkpoints):
            remove_stale_temporaries(folder)  # a checkpoint or summary half-written when the run was killed
        state = load_checkpoint(run.last)
        if "step" not in state:
            raise InputError(run.last, "holds no resume state (optimizer, rng, step)")
        trained = state.get("training_summary") or {}
        revision = recorded_revision(trained)
        if revision is not None and revision != ALIGN_REVISIONS.get(trained["align_neighbours"]):
            alignment = trained["align_neighbours"]
            raise InputError(run.last, f"was trained on neighbours aligned by revision {revision} of the {alignment} "
                             f"alignment; this grainwright computes revision {ALIGN_REVISIONS.get(alignment)}, and "
                             "training on would mix the two: start a new run")
    else:
        if data is not None:
            assignments.append(f'data.folder="{Path(data).resolve().as_posix()}"')
        config = load_config(config_path, assignments)  # first: a wrong config is named before a missing --data
        if data is None:
            raise ConfigError("--data DIR is required (the folder holding the training images)")
    if config["budget"]["steps"] == 0 and config["budget"]["minutes"] == 0:
        raise ConfigError("budget: both budget.steps and budget.minutes are 0, which would train nothing; give "
                          "--steps N or --minutes N")
    previous_threads = torch.get_num_threads()
    torch.set_num_threads(config["threads"] or physical_cores())
    try:
        setup, layout, noise = prepare(config, announce, resuming=state is not None)
        if state is not None:
            setup.summary["started_from"] = (state.get("training_summary") or {}).get("started_from")
            announce(f"resuming {run.root} at step {state['step']}")
            if state.get("data_fingerprint") != setup.data_fingerprint:
                announce("warning: the training files differ from the run's (names or sizes changed); the run "
                         "continues, but not exactly as it would have")
        else:
            stamp = datetime.datetime.now().strftime("%Y%m%d-%H%M%S")
            target = Path(out) if out else Path("runs") / f"{stamp}-{setup.config['scheme']}"
            remove_stale_temporaries(target.parent)  # run folders of killed runs that never got their name
            run = create_run_folder(target, validate(setup.config), noise)
        announce(f"{LAYOUT_TEXT[layout.name]}: {setup.summary['training_images']} training and "
                 f"{setup.summary['validation_images']} validation images; scheme {setup.config['scheme']}; "
                 f"{setup.model.name} ({setup.model.parameter_count()} parameters, "
                 f"{'channels-last' if setup.channels_last else 'standard'} layout, {setup.precision}); "
                 f"run folder {run.root}")
        summary = train(setup, run, resume=state, interrupt_at_step=interrupt_at_step)
    except FloatingPointError as error:
        raise GrainwrightError(f"{run.root}: {error}; resume from the last checkpoint with --resume") from None
    finally:
        torch.set_num_threads(previous_threads)
    _write_summary(run, summary)
    announce(summary_line(summary, run))
    return summary, run
