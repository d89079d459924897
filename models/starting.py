"""The shipped starting model: a generic, noise-level-conditioned grayscale denoiser, trained once on generated
data (``configs/starting-model.toml``), usable with no training at all and as the start of fine-tuning.

Files (package data of ``grainwright.models``):

``starting-model.pt``     an ordinary checkpoint (``grainwright.models.checkpoint``, loaded with
                          ``weights_only=True``), normalisation: float data in ``[0, 1]``
``starting-model.json``   the manifest: recipe (the config, verbatim), architecture, steps, wall time, machine,
                          seed, validation figures, and the SHA-256 of ``starting-model.pt``

Code that wants the starting model calls :func:`starting_model_path` / :func:`starting_model_manifest` /
:func:`load_starting_model`; :func:`starting_checkpoint_for` re-targets it to a user's data (normalisation taken
from their sample images as for a trained run, transform from their noise description, one network applied
channel by channel to colour or multi-band data), which ``grainwright starting-model export`` writes as an
ordinary self-describing ONNX file.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
from importlib import resources
from pathlib import Path
from typing import Any

from grainwright.inference.common.errors import ConfigError, GrainwrightError
from grainwright.models.checkpoint import checkpoint_payload, load_checkpoint
from grainwright.models.registry import build_model

WEIGHTS = "starting-model.pt"
MANIFEST = "starting-model.json"
ARCHITECTURE = "unet-noisemap"


def _package_file(name: str) -> Path:
    return Path(str(resources.files("grainwright.models").joinpath(name)))


def starting_model_path() -> Path:
    """The shipped weights file (a checkpoint); ``GrainwrightError`` when the install lacks it."""
    path = _package_file(WEIGHTS)
    if not path.is_file():
        raise GrainwrightError(f"{path}: the starting model is not installed (package data missing)")
    return path


def starting_model_manifest() -> dict[str, Any]:
    """The manifest beside the weights (recipe, architecture, steps, wall time, machine, seed, sha256, figures)."""
    path = _package_file(MANIFEST)
    if not path.is_file():
        raise GrainwrightError(f"{path}: the starting model's manifest is not installed (package data missing)")
    return json.loads(path.read_text())


def weights_sha256(path: str | Path | None = None) -> str:
    """SHA-256 (hex) of the weights file (default: the shipped one)."""
    return hashlib.sha256(Path(path or starting_model_path()).read_bytes()).hexdigest()


def load_starting_model() -> dict[str, Any]:
    """The shipped checkpoint payload, after checking its SHA-256 against the manifest."""
    expected = starting_model_manifest()["weights_sha256"]
    if weights_sha256() != expected:
        raise GrainwrightError(f"{starting_model_path()}: SHA-256 differs from the manifest's; the file is damaged")
    return load_checkpoint(starting_model_path())


def starting_checkpoint_for(normalization: Any, noise: Any = None,
                            payload: dict[str, Any] | None = None) -> dict[str, Any]:
    """A checkpoint payload of the starting model for data normalised by ``normalization``.

    Parameters
    ----------
    normalization : Normalization
        The user's data (``Normalization.for_array`` on their images; with the generalized Anscombe transform for
        Poisson-Gaussian noise, or the log transform with the number of looks for gamma speckle). The network
        works in the working range, so only this mapping changes.
    noise : NoiseModel, optional
        The user's noise description, recorded in the checkpoint (and so in the ONNX metadata).
    payload : dict, optional
        The starting checkpoint (default: the shipped one).

    One or more channels: the grayscale network denoises each channel on its own (``per_channel``).

    Log domain (gamma speckle of ``L`` looks): the noise there is additive, of variance ``polygamma(1, L)`` and
    mean ``psi(L) - ln L`` (``transforms.speckle_log_mean``). The network, trained on zero-mean Gaussian noise,
    removes the noise about its mean and so leaves that mean in its output, exactly as a network trained on noisy
    targets does: the log transform is the trainer's ``Normalization.with_log(looks=L, noisy_targets=True)``,
    whose inverse subtracts the bias before ``exp``.
    """
    normalization = starting_normalization(normalization)
    source = payload or load_starting_model()
    hyper = dict(source["hyper"], per_channel=True)
    model = build_model(source["architecture"], normalization.channels, **hyper)
    model.load_state_dict(source["state_dict"])
    summary = dict(source.get("training_summary") or {}, starting_model=True)
    sigma_max = trained_level_max(source)
    if normalization.transform:  # the level the network sees in the transformed domain (working units)
        training_noise = None
    else:
        span = normalization.full_range
        training_noise = {"sigma_native": sigma_max / 2 * span, "sigma_native_range": [0.0, sigma_max * span],
                          "effective_bit_depth": normalization.bit_depth,
                          "source": "the starting model's training range"}
    return checkpoint_payload(model, normalization, noise=noise, scheme="starting model (no training on this data)",
                              training_summary=summary, training_noise=training_noise)


def starting_normalization(normalization: Any) -> Any:
    """``normalization`` as the starting model needs it: no transform or the Anscombe transform unchanged; the log
    transform rebuilt by the trainer's ``with_log`` with the speckle bias removed on the way back (it needs the
    number of looks, which fixes the noise level and the bias). ``ConfigError`` for anything else."""
    transform = normalization.transform
    kind = None if not transform else transform.get("kind")
    if kind in (None, "anscombe"):
        return normalization
    if kind != "log":
        raise ConfigError(f"the starting model takes Gaussian, Poisson-Gaussian (Anscombe domain) or gamma speckle "
                          f"noise (log domain); the transform '{kind}' is not supported")
    if "looks" not in transform:
        raise ConfigError("the starting model in the log domain needs the number of looks of the gamma speckle "
                          "(it sets the noise level and the log-domain bias); give a noise.toml of kind "
                          "\"speckle-gamma\"")
    linear = dataclasses.replace(normalization, transform=None)
    return linear.with_log(epsilon=float(transform["epsilon"]), looks=float(transform["looks"]), noisy_targets=True)


def trained_level_max(payload: dict[str, Any] | None = None) -> float:
    """The largest Gaussian noise level the starting model was trained on, working units (75/255 for the shipped
    one: its normalisation is float data in ``[0, 1]``)."""
    source = payload or load_starting_model()
    return float(source["training_noise"]["sigma_native_range"][1])


def starting_working_level(normalization: Any, noise: Any = None) -> float | None:
    """The Gaussian noise level the network sees for this data, in working units (after the transform's scaling),
    where one level holds everywhere: ``Normalization.working_noise_sigma()`` in the Anscombe domain (``1 / scale``)
    and in the log domain (``sqrt(polygamma(1, L)) / scale``), the ``sigma`` of a Gaussian noise description;
    None when it varies by image (no description: ``denoise`` estimates it per image)."""
    if normalization.transform:
        return normalization.working_noise_sigma()
    if noise is not None and noise.kind == "gaussian":
        return float(noise.sigma)
    return None


def level_warning(normalization: Any, noise: Any, payload: dict[str, Any] | None = None) -> str | None:
    """A warning line when the data's noise level is above the starting model's trained range, else None."""
    level, sigma_max = starting_working_level(normalization, noise), trained_level_max(payload)
    if level is None or level <= sigma_max:
        return None
    domain = {None: "", "anscombe": " in the Anscombe domain", "log": " in the log domain"}[
        (normalization.transform or {}).get("kind")]
    return (f"warning: the noise level{domain} is {level * 255:.1f}/255 of the working range, above the "
            f"{sigma_max * 255:.0f}/255 the starting model was trained on; it extrapolates there and may denoise "
            "poorly: train a model on your data instead")


def normalization_for_samples(samples: str | Path, noise_path: str | Path | None = None,
                              bit_depth: int | None = None) -> tuple[Any, Any]:
    """The normalisation of the user's data, taken from their sample images as for a trained run, and their noise
    description (or None).

    ``Normalization.for_array`` over all sample images (dtype, effective bit depth, range, channels); with a
    Poisson or Poisson-Gaussian ``noise.toml``, the generalized Anscombe transform, so the network sees Gaussian
    noise of unit variance (scaled to working units) as in ``grainwright train``; with gamma speckle
    (``speckle-gamma``), the trainer's log transform for its number of looks, with the speckle's log-domain bias
    removed on the way back (see :func:`starting_checkpoint_for`).
    """
    import numpy as np

    from grainwright.inference.common.errors import InputError
    from grainwright.inference.images.imageio import find_images, read_frames
    from grainwright.inference.images.normalization import Normalization
    from grainwright.inference.noise.models import load_noise

    files = find_images([samples])
    if not files:
        raise InputError(samples, "no sample images found (supported: PNG, TIFF, .npy)")
    frames = [read_frames(path) for path in files]
    channels = {frame.shape[-1] for frame in frames}
    if len(channels) > 1:
        raise InputError(samples, f"sample images differ in channel count ({sorted(channels)}); give one kind")
    dtypes = {frame.dtype for frame in frames}
    if len(dtypes) > 1:
        raise InputError(samples, f"sample images differ in dtype ({', '.join(sorted(map(str, dtypes)))})")
    stacked = np.concatenate([frame.reshape(1, -1, frame.shape[-1]) for frame in frames], axis=1)
    normalization = Normalization.for_array(stacked, bit_depth)
    noise = load_noise(noise_path) if noise_path is not None else None
    if noise is not None:
        if noise.kind in ("poisson", "poisson-gaussian"):
            normalization = normalization.with_anscombe(noise.gain, getattr(noise, "read", 0.0))
        elif noise.kind == "speckle-gamma":
            normalization = normalization.with_log(looks=float(noise.looks), noisy_targets=True)
        elif noise.kind != "gaussian":
            raise ConfigError(f"{noise_path}: noise kind '{noise.kind}': the starting model takes Gaussian, "
                              "Poisson-Gaussian or gamma speckle noise; train a model on your data for this kind")
    return normalization, noise


def export_starting_model(samples: str | Path, output: str | Path, *, noise_path: str | Path | None = None,
                          bit_depth: int | None = None, int8: bool = False, min_int8_psnr: float = 40.0,
                          overwrite: bool = False, threads: int = 2, payload: dict[str, Any] | None = None,
                          log: Any = lambda message: None) -> Any:
    """Write the starting model as an ordinary self-describing ONNX file for the data of ``samples``.

    The checkpoint for the data (:func:`starting_checkpoint_for`) goes through the usual export
    (``grainwright.models.export.export_checkpoint``: parity checks on random data and on a crop of the samples,
    metadata, optional INT8 calibrated on the samples). ``payload``: another starting checkpoint (default: the
    shipped one). Returns the ``ExportResult``.
    """
    import tempfile

    from grainwright.models.checkpoint import save_checkpoint
    from grainwright.models.export import export_checkpoint

    normalization, noise = normalization_for_samples(samples, noise_path, bit_depth)
    source = payload or load_starting_model()
    for_data = starting_checkpoint_for(normalization, noise, source)
    normalization = starting_normalization(normalization)
    log(f"starting model for {normalization.channels}-channel {normalization.dtype} data"
        f"{'' if normalization.bit_depth is None else f' ({normalization.bit_depth}-bit)'}, range "
        f"[{normalization.low:g}, {normalization.high:g}]"
        + (f", {normalization.transform['kind']} transform" if normalization.transform else "")
        + ("; each channel denoised on its own by the grayscale network" if normalization.channels > 1 else ""))
    for line in _level_lines(normalization, noise, source):
        log(line)
    with tempfile.TemporaryDirectory(prefix="grainwright-starting-") as folder:
        checkpoint = save_checkpoint(Path(folder) / "starting-for-data.pt", for_data)
        return export_checkpoint(checkpoint, output, calibration=samples, int8=int8, min_int8_psnr=min_int8_psnr,
                                 overwrite=overwrite, threads=threads, log=log)


def _level_lines(normalization: Any, noise: Any, payload: dict[str, Any]) -> list[str]:
    """Export log lines on the noise level: the level the network sees in a transformed domain, how to give it
    per pixel, and a warning when it lies above the trained range."""
    lines = []
    kind = (normalization.transform or {}).get("kind")
    if kind is not None:
        level = starting_working_level(normalization, noise)
        lines.append(f"noise level in the {kind} domain: {level * 255:.1f}/255 of the working range (trained on 0 "
                     f"to {trained_level_max(payload) * 255:.0f}/255); denoise and compare give it per pixel from "
                     "the noise description (--noise-sigma auto, the default, chooses model)")
    warning = level_warning(normalization, noise, payload)
    if warning:
        lines.append(warning)
    return lines
