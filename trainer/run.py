"""``grainwright train``: from a config and a data folder to a run folder.

Everything that can fail on bad input (config, layout, images, scheme/layout fit, model) is checked before the
run folder exists; the folder is then created under a temporary name holding ``config.toml`` and ``noise.toml``
and renamed into place, and ``checkpoints/last.pt`` is written before the first step. A failed start leaves
nothing behind, and a run that stops at any later point can be resumed with ``--resume``.
"""
from __future__ import annotations

import datetime
import json
import os
import shutil
import tempfile
import warnings
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import torch

from grainwright.inference.common.atomic import write_text_atomic
from grainwright.inference.common.errors import (
    ConfigError,
    GrainwrightError,
    InputError,
)
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
)
from grainwright.trainer.loop import TrainingSetup, fastest_step, train
from grainwright.trainer.schemes.registry import (
    check_scheme_fits,
    choose_scheme,
    scheme_class,
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
    """What ``analyse_noise`` found on (up to ``MAX_ANALYSED``) noisy training images.

    ``per_image_sigma``: wavelet-MAD sigma per image and channel, native units; ``model``: the suggested noise
    model (working units) of the most common kind; ``confident``: most analyses trust their model; ``flags``:
    the banding/correlation flags raised on most images.
    """

    per_image_sigma: np.ndarray
    model: Any
    kind: str
    confident: bool
    flags: list[str]


def _analyse_noise(images: list[np.ndarray], normalization: Any) -> NoiseFindings:
    from grainwright.inference.noise.estimation import analyse_noise

    step = max(1, len(images) // MAX_ANALYSED)
    analyses = [analyse_noise(image, normalization.low, normalization.high) for image in images[::step][:MAX_ANALYSED]]
    kind = Counter(analysis.kind for analysis in analyses).most_common(1)[0][0]
    typical = next(analysis for analysis in analyses if analysis.kind == kind)
    majority = len(analyses) / 2
    flags = [name for name in ("banding", "correlation") if sum(getattr(a, name).flagged for a in analyses) > majority]
    return NoiseFindings(np.array([analysis.sigma for analysis in analyses]), typical.model, kind,
                         sum(analysis.confident for analysis in analyses) > majority, flags)


def _correct_fixed_pattern(images: list[dict[str, np.ndarray]], roles: tuple[str, ...]) -> None:
    from grainwright.inference.noise.estimation import correct_fixed_pattern

    for item in images:
        for role in roles:
            if role != "clean":
                item[role] = correct_fixed_pattern(item[role])


def prepare(config: dict[str, Any], announce: Callable[[str], None] = print) -> tuple[TrainingSetup, Layout, Any]:
    """Check the config against the data and build everything the loop needs.

    Returns the setup, the layout found and the noise model used (or None). Raises ``GrainwrightError`` on any
    problem with the data or the config; nothing is written.
    """
    from grainwright.inference.images.normalization import Normalization

    data_cfg = config["data"]
    layout = detect_layout(data_cfg["folder"])
    noise, noise_path = _noise_description(config, layout.root)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        images, _ = read_layout(layout, data_cfg["patch_size"])
    for warning in caught:
        announce(f"warning: {warning.message}")
    roles = layout.roles
    native = [item[role] for item in images for role in roles]
    channels = native[0].shape[2]
    stacked = np.concatenate([array.reshape(1, -1, channels) for array in native], axis=1)
    normalization = Normalization.for_array(stacked, data_cfg["bit_depth"] or None)
    del stacked

    # The noise of the noisy images: level (native units for the summary, working units for the schemes), model,
    # flags.
    noisy_native = [item[role] for item in images for role in roles if role != "clean"]
    findings = _analyse_noise(noisy_native, normalization) if noisy_native else None
    estimated = findings is not None and findings.confident and findings.kind in ("gaussian", "poisson-gaussian")

    name = config["scheme"]
    if name == "auto":
        name, reason = choose_scheme(layout.name, noise is not None, estimated)
        announce(f"scheme auto: {reason}")
    check_scheme_fits(name, layout.name)
    if layout.name == "clean-only" and noise is None:
        raise ConfigError(f"found {LAYOUT_TEXT['clean-only']} but no noise description: put a noise.toml in "
                          f"{layout.root} or set noise.file")
    config = dict(config, scheme=name)
    if noise is None and findings is not None:
        noise = findings.model
        announce(f"noise estimated from the images: {noise.describe()} (working units)"
                 + ("" if findings.confident else "; the estimate is uncertain"))

    # Working-range transform and the noise level the schemes see.
    transform = data_cfg["transform"]
    kind = None if noise is None else noise.kind
    if transform == "auto":
        transform = "anscombe" if name == "recorrupted" and kind in ("poisson", "poisson-gaussian") else "none"
    sigma = None
    if transform == "anscombe":
        if layout.name == "clean-only":
            raise ConfigError("data.transform: the Anscombe transform applies to real noisy data; with clean images "
                              "only the noise is synthesised in the linear range (use transform = \"none\")")
        if kind not in ("poisson", "poisson-gaussian"):
            raise ConfigError(f"data.transform = \"anscombe\" needs Poisson-Gaussian noise, but the noise is "
                              f"'{kind}' (give a noise.toml with kind \"poisson-gaussian\")")
        gain, read = noise.gain, getattr(noise, "read", 0.0)
        normalization = normalization.with_anscombe(gain, read)
        sigma = np.full(channels, normalization.working_noise_sigma(), dtype=np.float32)
        announce(f"training in the generalized-Anscombe domain (gain {gain:.4g}, read {read:.4g} of the range)")
    elif kind == "gaussian":
        sigma = np.full(channels, noise.sigma, dtype=np.float32)
    elif findings is not None:
        sigma = (np.median(findings.per_image_sigma, axis=0) / normalization.full_range).astype(np.float32)
    if name == "recorrupted" and transform != "anscombe" and kind != "gaussian":
        raise ConfigError(f"scheme 'recorrupted' needs Gaussian or Poisson-Gaussian noise of known level, but the "
                          f"noise {'description ' + str(noise_path) if noise_path else 'estimated'} is '{kind}'; "
                          "give a noise.toml, or use neighbor2neighbor")

    working = [{role: normalization.to_working(array) for role, array in item.items()} for item in images]
    del images, native, noisy_native
    mode, fixed_pattern = data_cfg["fixed_pattern"], False
    if mode == "always" or (mode == "auto" and findings is not None and findings.flags):
        if mode == "auto":
            announce(f"warning: the {' and '.join(findings.flags)} flag is raised on the noisy images; every "
                     "self-supervised scheme assumes zero-mean noise independent from pixel to pixel, so the "
                     "row/column fixed-pattern correction is applied before training (see the README's limits)")
        _correct_fixed_pattern(working, roles)
        fixed_pattern = True

    # Split by image; a single image is split into two regions.
    rng = np.random.default_rng(config["seed"])
    if len(working) == 1:
        train_part, validation_part = split_single_image(working[0], data_cfg["validation_fraction"],
                                                         data_cfg["patch_size"])
        train_images, validation_images = [train_part], [] if validation_part is None else [validation_part]
    else:
        train_index, validation_index = split_by_image(len(working), data_cfg["validation_fraction"], rng)
        train_images = [working[i] for i in train_index]
        validation_images = [working[i] for i in validation_index]
    if not validation_images:
        announce("warning: no images held out for validation; the last state is kept as the best")

    def source(items: list[dict[str, np.ndarray]]) -> PatchSource:
        return PatchSource({role: [item[role] for item in items] for role in roles})

    # Model: skip off for blind-spot schemes; patch size a multiple of the alignment.
    cls = scheme_class(name)
    skip = config["model"]["skip"]
    if skip == "auto":
        skip = not cls.needs_no_skip
    elif skip and cls.needs_no_skip:
        raise ConfigError(f"model.skip = true: scheme '{name}' needs an architecture without the input-to-output "
                          "skip (it would hand each masked pixel its own noisy value); set model.skip = false")
    hyper = {**hyper_defaults(config["model"]["name"]), **config["model"]["hyper"], "skip": skip}
    torch.manual_seed(config["seed"])
    try:
        model = build_model(config["model"]["name"], channels, **hyper)
    except (TypeError, ValueError) as error:
        raise ConfigError(f"model.hyper: {error}") from None
    multiple = cls.patch_multiple * model.alignment
    if data_cfg["patch_size"] % multiple:
        raise ConfigError(f"data.patch_size: {data_cfg['patch_size']} must be a multiple of {multiple} for scheme "
                          f"'{name}' with architecture '{model.name}'")
    if model.takes_noise_map and sigma is None:
        raise ConfigError(f"model.name: '{model.name}' needs a noise level: give a noise.toml (noise.file)")
    channels_last, precision = config["model"]["channels_last"], config["model"]["precision"]
    if "auto" in (channels_last, precision):
        layouts = (False, True) if channels_last == "auto" else (channels_last,)
        precisions = ("float32", "bfloat16") if precision == "auto" else (precision,)
        (channels_last, precision), seconds = fastest_step(model, channels, data_cfg["patch_size"],
                                                           data_cfg["batch_size"], layouts, precisions)
        measured = ", ".join(f"{'channels-last' if layout else 'standard'} {kind} {value * 1e3:.0f}"
                             for (layout, kind), value in seconds.items())
        announce(f"step arithmetic: {'channels-last' if channels_last else 'standard'} layout, {precision} "
                 f"(measured ms per step: {measured})")
    config = dict(config, model=dict(config["model"], skip=skip, hyper=dict(model.hyper), channels_last=channels_last,
                                     precision=precision))
    scheme = cls(config, noise, sigma, level_maps=model.takes_noise_map)

    validation: list[dict[str, np.ndarray]] = []
    if validation_images:
        fixed = np.random.default_rng([config["seed"], 1])
        patches = source(validation_images).sample(fixed, config["validation"]["patches"], data_cfg["patch_size"],
                                                   augment=False)
        size = data_cfg["batch_size"]
        for start in range(0, config["validation"]["patches"], size):
            chunk = {role: array[start:start + size] for role, array in patches.items()}
            validation.append(scheme.prepare(chunk, fixed))

    training_noise = None
    if findings is not None:
        per_image = findings.per_image_sigma.mean(axis=1)
        training_noise = {"sigma_native": float(np.median(per_image)),
                          "sigma_native_range": [float(per_image.min()), float(per_image.max())],
                          "effective_bit_depth": normalization.bit_depth}
    summary = {"layout": layout.name, "scheme": name, "training_images": len(train_images),
               "validation_images": len(validation_images), "data_folder": str(layout.root),
               "fixed_pattern_corrected": fixed_pattern, "transform": transform,
               "parameters": model.parameter_count(), "macs_per_pixel": model.macs_per_pixel(),
               "channels_last": channels_last, "precision": precision}
    setup = TrainingSetup(config=config, scheme=scheme, model=model, train=source(train_images),
                          validation=validation, ground_truth=layout.has_ground_truth, normalization=normalization,
                          channels_last=channels_last, precision=precision,
                          noise=noise, data_fingerprint=data_fingerprint(sorted({p for s in layout.samples for p in s})),
                          training_noise=training_noise, summary=summary)
    return setup, layout, noise


def _create_run_folder(out: Path, config: dict[str, Any], noise: Any) -> RunFolder:
    """Write ``config.toml`` and ``noise.toml`` into a temporary folder beside ``out`` and rename it into place."""
    from grainwright.inference.common.tomlio import write_toml
    from grainwright.inference.noise.models import save_noise

    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise InputError(out, "run folder exists and is not empty (choose another --out, or --resume it)")
    out.parent.mkdir(parents=True, exist_ok=True)
    temporary = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".partial", dir=out.parent))
    umask = os.umask(0)
    os.umask(umask)
    try:
        temporary.chmod(0o777 & ~umask)  # mkdtemp makes it private; a run folder is an ordinary folder
        write_toml(temporary / "config.toml", config, header="grainwright training config, resolved (every key)")
        if noise is not None:
            save_noise(noise, temporary / "noise.toml")
        if out.exists():
            out.rmdir()
        os.replace(temporary, out)
    except BaseException:
        shutil.rmtree(temporary, ignore_errors=True)
        raise
    return RunFolder(out)


def _write_summary(run: RunFolder, summary: dict[str, Any]) -> None:
    write_text_atomic(run.summary, json.dumps(summary, indent=2, default=float) + "\n")


def summary_line(summary: dict[str, Any], run: RunFolder) -> str:
    best = summary.get("best_validation") or {}
    if "psnr" in best:
        figure = f"best validation PSNR {best['psnr']:.2f} dB, SSIM {best['ssim']:.4f} at step {summary['best_step']}"
    elif "loss" in best:
        figure = f"best validation loss {best['loss']:.4g} at step {summary['best_step']}"
    else:
        figure = "no validation"
    return (f"trained {summary['scheme']} for {summary['steps']} steps in {summary['minutes']:.1f} min "
            f"({summary['patches_per_second']:.0f} patches/s, {summary['gflops_per_second']:.1f} GFLOP/s); {figure}; "
            f"stopped: {summary['stopped']}; run folder {run.root}"
            + (f" (continue with: grainwright train --resume {run.root})" if summary["stopped"] == "interrupted" else ""))


def train_command(config_path: str | None, data: str | None, *, scheme: str | None = None,
                  assignments: list[str] = (), minutes: float | None = None, steps: int | None = None,
                  out: str | None = None, resume: str | None = None, interrupt_at_step: int | None = None,
                  announce: Callable[[str], None] = print) -> tuple[dict[str, Any], RunFolder]:
    """Run ``grainwright train``; return the training summary and the run folder."""
    assignments = list(assignments)
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
        state = load_checkpoint(run.last)
        if "step" not in state:
            raise InputError(run.last, "holds no resume state (optimizer, rng, step)")
    else:
        if data is None:
            raise ConfigError("--data DIR is required (the folder holding the training images)")
        assignments.append(f'data.folder="{Path(data).resolve().as_posix()}"')
        config = load_config(config_path, assignments)
    previous_threads = torch.get_num_threads()
    torch.set_num_threads(config["threads"] or physical_cores())
    try:
        setup, layout, noise = prepare(config, announce)
        if state is not None:
            announce(f"resuming {run.root} at step {state['step']}")
            if state.get("data_fingerprint") != setup.data_fingerprint:
                announce("warning: the training files differ from the run's (names or sizes changed); the run "
                         "continues, but not exactly as it would have")
        else:
            stamp = datetime.datetime.now().strftime("%Y%m%d-%H%M%S")
            target = Path(out) if out else Path("runs") / f"{stamp}-{setup.config['scheme']}"
            run = _create_run_folder(target, validate(setup.config), noise)
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
