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
from pathlib import Path
from typing import Any, Callable

import numpy as np
import torch

from grainwright.inference.errors import ConfigError, GrainwrightError, InputError
from grainwright.models.checkpoint import RunFolder, data_fingerprint, load_checkpoint
from grainwright.models.registry import build_model, hyper_defaults
from grainwright.trainer.config import load_config, validate
from grainwright.trainer.data import LAYOUT_TEXT, Layout, PatchSource, detect_layout, read_layout, split_by_image, \
    split_single_image
from grainwright.trainer.loop import TrainingSetup, train
from grainwright.trainer.schemes.registry import check_scheme_fits, choose_scheme, scheme_class

# Relative spread (std / mean) of the per-image MAD estimates below which the noise level counts as estimated
# confidently for the `auto` choice (common practice, no source).
CONFIDENT_SPREAD = 0.25


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
    from grainwright.inference.noise import load_noise

    given = config["noise"]["file"]
    path = Path(given) if given else root / "noise.toml"
    if given and not path.is_file():
        raise InputError(path, "noise description not found (noise.file)")
    return (load_noise(path), path) if path.is_file() else (None, None)


def _estimate_noise(images: list[np.ndarray]) -> tuple[np.ndarray, bool, tuple[float, float] | None]:
    """Per-image, per-channel Gaussian sigma (MAD estimate, units of the images), whether the estimate is
    confident, and a Poisson-Gaussian ``(gain, read)`` fit when the noise looks signal-dependent."""
    from grainwright.inference.estimation import estimate_sigma, fit_poisson_gaussian

    per_image = np.array([estimate_sigma(image) for image in images], dtype=np.float64)
    spread = per_image.std(axis=0) / np.maximum(per_image.mean(axis=0), 1e-12)
    confident = bool(np.all(np.median(per_image, axis=0) > 0) and np.all(spread < CONFIDENT_SPREAD))
    fit = fit_poisson_gaussian(images[int(np.argmax([image.size for image in images]))])
    poisson = (float(fit.gain), float(fit.read)) if fit.signal_dependent and fit.confident else None
    return per_image, confident or poisson is not None, poisson


def _fixed_pattern(images: list[dict[str, np.ndarray]], roles: tuple[str, ...], mode: str,
                   announce: Callable[[str], None]) -> bool:
    """Apply the row/column fixed-pattern correction to the noisy roles when asked, or when the banding or
    correlation flag is raised on them (``mode = "auto"``). Returns whether it was applied."""
    from grainwright.inference.estimation import analyse_noise, correct_fixed_pattern

    noisy_roles = [role for role in roles if role != "clean"]
    if mode == "never" or not noisy_roles:
        return False
    if mode == "auto":
        report = analyse_noise(images[0][noisy_roles[0]])
        flags = [name for name in ("banding", "correlated") if report.get("flags", {}).get(name)]
        if not flags:
            return False
        warnings.warn(f"the {' and '.join(flags)} flag is raised: self-supervised schemes assume pixel-independent "
                      "noise; applying the row/column fixed-pattern correction before training", stacklevel=2)
    announce("applying the row/column fixed-pattern correction to the noisy images")
    for item in images:
        for role in noisy_roles:
            item[role] = correct_fixed_pattern(item[role])
    return True


def prepare(config: dict[str, Any], announce: Callable[[str], None] = print) -> tuple[TrainingSetup, Layout, Any]:
    """Check the config against the data and build everything the loop needs.

    Returns the setup, the layout found and the noise model used (or None). Raises ``GrainwrightError`` on any
    problem with the data or the config; nothing is written.
    """
    from grainwright.inference.noise import noise_from_dict
    from grainwright.inference.normalization import Normalization

    data_cfg = config["data"]
    layout = detect_layout(data_cfg["folder"])
    noise, noise_path = _noise_description(config, layout.root)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        images, sources = read_layout(layout, data_cfg["patch_size"])
    for warning in caught:
        announce(f"warning: {warning.message}")
    roles = layout.roles
    native = [item[role] for item in images for role in roles]
    channels = native[0].shape[2]
    stacked = np.concatenate([array.reshape(1, -1, channels) for array in native], axis=1)
    normalization = Normalization.for_array(stacked, data_cfg["bit_depth"] or None)
    del stacked

    # Noise level of the noisy images (native units for the data profile, working units for the schemes).
    noisy_native = [item[role] for item in images for role in roles if role != "clean"]
    estimated_sigma, confident, poisson = None, False, None
    if noisy_native:
        per_image_sigma, confident, poisson = _estimate_noise(noisy_native)
        estimated_sigma = (np.median(per_image_sigma, axis=0) / normalization.full_range).astype(np.float32)
        if poisson is not None:
            poisson = (poisson[0] / normalization.full_range, poisson[1] / normalization.full_range)

    name = config["scheme"]
    if name == "auto":
        name, reason = choose_scheme(layout.name, noise is not None, confident)
        announce(f"scheme auto: {reason}")
    check_scheme_fits(name, layout.name)
    if layout.name == "clean-only" and noise is None:
        raise ConfigError(f"found {LAYOUT_TEXT['clean-only']} but no noise description: put a noise.toml in "
                          f"{layout.root} or set noise.file")
    config = dict(config, scheme=name)

    # Working-range transform and the noise level the schemes see.
    transform = data_cfg["transform"]
    kind = None if noise is None else noise.to_dict()["kind"]
    if transform == "auto":
        signal_dependent = kind in ("poisson", "poisson-gaussian") or (noise is None and poisson is not None)
        transform = "anscombe" if name == "recorrupted" and signal_dependent else "none"
    if transform == "anscombe":
        if layout.name == "clean-only":
            raise ConfigError("data.transform: the Anscombe transform applies to real noisy data; with clean images "
                              "only the noise is synthesised in the linear range (use transform = \"none\")")
        if kind in ("poisson", "poisson-gaussian"):
            gain, read = noise.gain, getattr(noise, "read", 0.0)
        elif poisson is not None:
            gain, read = poisson
        else:
            raise ConfigError("data.transform = \"anscombe\" needs Poisson-Gaussian noise (a noise.toml with kind "
                              "\"poisson-gaussian\", or images whose noise is fitted as signal-dependent)")
        normalization = normalization.with_anscombe(gain, read)
        sigma = np.full(channels, normalization.working_noise_sigma(), dtype=np.float32)
        announce(f"training in the generalized-Anscombe domain (gain {gain:.4g}, read {read:.4g} of the range)")
    elif kind == "gaussian":
        sigma = np.full(channels, noise.sigma, dtype=np.float32)
    else:
        sigma = estimated_sigma
    if name == "recorrupted":
        if noise is not None and kind not in ("gaussian", "poisson", "poisson-gaussian"):
            raise ConfigError(f"scheme 'recorrupted' needs Gaussian or Poisson-Gaussian noise, but the noise "
                              f"description {noise_path} has kind '{kind}'; use neighbor2neighbor")
        if sigma is None or not np.all(sigma > 0):
            raise ConfigError("scheme 'recorrupted' needs the noise level: give a noise.toml (noise.file) or data "
                              "whose noise the estimator can measure")
        if noise is None:
            announce(f"recorrupted: noise sigma estimated by the MAD estimator: "
                     f"{', '.join(f'{s * normalization.full_range:.4g}' for s in sigma)} (native units)")
    if noise is None and estimated_sigma is not None:
        noise = noise_from_dict({"kind": "gaussian", "sigma": float(np.mean(estimated_sigma))})

    working = [{role: normalization.to_working(array) for role, array in item.items()} for item in images]
    del images, native, noisy_native
    fixed_pattern = _fixed_pattern(working, roles, data_cfg["fixed_pattern"], announce)

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
    config = dict(config, model=dict(config["model"], skip=skip, hyper=dict(model.hyper)))
    scheme = cls(config, noise, sigma)

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
    if estimated_sigma is not None:
        per_image = per_image_sigma.mean(axis=1)
        training_noise = {"sigma_native": float(np.mean(estimated_sigma) * normalization.full_range),
                          "sigma_native_range": [float(per_image.min()), float(per_image.max())],
                          "effective_bit_depth": normalization.bit_depth}
    summary = {"layout": layout.name, "scheme": name, "training_images": len(train_images),
               "validation_images": len(validation_images), "data_folder": str(layout.root),
               "fixed_pattern_corrected": fixed_pattern, "transform": transform,
               "parameters": model.parameter_count(), "macs_per_pixel": model.macs_per_pixel()}
    setup = TrainingSetup(config=config, scheme=scheme, model=model, train=source(train_images),
                          validation=validation, ground_truth=layout.has_ground_truth, normalization=normalization,
                          noise=noise, data_fingerprint=data_fingerprint(sorted({p for s in layout.samples for p in s})),
                          training_noise=training_noise, summary=summary)
    return setup, layout, noise


def _create_run_folder(out: Path, config: dict[str, Any], noise: Any) -> RunFolder:
    """Write ``config.toml`` and ``noise.toml`` into a temporary folder beside ``out`` and rename it into place."""
    from grainwright.inference.noise import save_noise
    from grainwright.inference.tomlio import write_toml

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
    handle, temporary = tempfile.mkstemp(prefix=".training-summary.", suffix=".tmp", dir=run.root)
    with os.fdopen(handle, "w", encoding="utf-8") as stream:
        json.dump(summary, stream, indent=2, default=float)
        stream.write("\n")
    os.replace(temporary, run.summary)


def summary_line(summary: dict[str, Any], run: RunFolder) -> str:
    best = summary.get("best_validation") or {}
    if "psnr" in best:
        figure = f"best validation PSNR {best['psnr']:.2f} dB, SSIM {best['ssim']:.4f}"
    elif "loss" in best:
        figure = f"best validation loss {best['loss']:.4g}"
    else:
        figure = "no validation"
    return (f"trained {summary['scheme']} for {summary['steps']} steps in {summary['minutes']:.1f} min "
            f"({summary['patches_per_second']:.0f} patches/s, {summary['gflops_per_second']:.1f} GFLOP/s); {figure} "
            f"at step {summary['best_step']}; stopped: {summary['stopped']}; run folder {run.root}")


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
        setup, layout, _ = prepare(config, announce)
        announce(f"resuming {run.root} at step {state['step']}")
    else:
        if data is None:
            raise ConfigError("--data DIR is required (the folder holding the training images)")
        assignments.append(f'data.folder="{Path(data).resolve().as_posix()}"')
        config = load_config(config_path, assignments)
        setup, layout, noise = prepare(config, announce)
        stamp = datetime.datetime.now().strftime("%Y%m%d-%H%M%S")
        target = Path(out) if out else Path("runs") / f"{stamp}-{setup.config['scheme']}"
        run = _create_run_folder(target, validate(setup.config), noise)
    announce(f"{LAYOUT_TEXT[layout.name]}: {setup.summary['training_images']} training and "
             f"{setup.summary['validation_images']} validation images; scheme {setup.config['scheme']}; "
             f"{setup.model.name} ({setup.model.parameter_count()} parameters); run folder {run.root}")
    threads = setup.config["threads"] or physical_cores()
    previous_threads = torch.get_num_threads()
    torch.set_num_threads(threads)
    try:
        summary = train(setup, run, resume=state, interrupt_at_step=interrupt_at_step)
    except FloatingPointError as error:
        raise GrainwrightError(f"{run.root}: {error}; resume from the last checkpoint with --resume") from None
    finally:
        torch.set_num_threads(previous_threads)
    _write_summary(run, summary)
    announce(summary_line(summary, run))
    return summary, run
