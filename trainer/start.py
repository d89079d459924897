"""Where a run starts, and keeping the better of its start and its end.

Start (``start.weights``): the shipped starting model (``grainwright.models.starting``, a grayscale
``unet-noisemap`` told the noise level), random weights, or an earlier run of the user's. Fine-tuning a pretrained
denoiser on the user's own noisy frames, without ground truth, is the setting of Soltanayev and Chun, "Training
deep learning based denoisers without ground truth data", NeurIPS 2018. The starting model fits when the
configured architecture is its own (name and hyper-parameters, input-to-output skip included: the blind-spot
scheme ``masked`` trains without the skip, so it starts from random weights); for several channels the grayscale
network denoises each channel on its own (``per_channel``), so any channel count fits.

Selection: a run that started from trained weights scores its starting state and its final ``best.pt`` on
held-out noisy frames by a criterion that needs no ground truth, and keeps the better one as ``best.pt``:

- Monte-Carlo SURE (Stein 1981; Ramani, Blu and Unser, IEEE TIP 2008) where the noise is Gaussian of known level
  in the working domain (Gaussian noise);
- for Poisson-Gaussian noise (trained after the generalized Anscombe transform), its first-order extension to
  mixed Poisson-Gaussian noise (Luisier, Blu and Unser, IEEE TIP 2011) on the values before the transform, where
  the images' PSNR is measured (SURE in the Anscombe domain weighs dark pixels more than the PSNR does). Neither
  is reliable for a network fine-tuned on such noise: on the benchmark's held-out frames both underestimated the
  fine-tuned state's error by up to 18% and 8% while staying within 2% for the start (docs/benchmarks.md);
- the J-invariant loss (Batson and Royer 2019; the true error plus the noise variance in expectation) otherwise
  (log-domain speckle, whose log is skewed, or noise of unknown level);
- the mean squared error against the clean frames when the layout has ground truth.

Both states are scored on the same frames with the same random probe, so the noise draw that SURE cannot know is
common to both and small differences are resolved.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import torch

from grainwright.inference.common.errors import ConfigError

STARTING_MODEL = "starting-model"
RANDOM = "random"
EARLIER_RUN = "earlier run"
# Held-out frames for the selection: centre crops of at most this edge (pixels), at most this many frames. Enough
# pixels (up to 2 x 10^6) for one SURE probe to resolve hundredths of a dB, seconds of a small model.
HELDOUT_EDGE = 512
HELDOUT_FRAMES = 8
# Label of each criterion in the summary line and training-summary.json.
CRITERIA = {"sure": "MC-SURE", "sure-poisson-gaussian": "MC-SURE, Poisson-Gaussian, before the transform",
            "j-invariant": "J-invariant loss", "ground-truth": "MSE against ground truth"}


def fit_start_config(config: dict[str, Any], channels: int) -> dict[str, Any]:
    """The config with ``model.hyper.per_channel = true`` when the starting model will be fine-tuned on data of
    several channels (the grayscale network, each channel on its own) and the config does not say otherwise."""
    hyper = config["model"]["hyper"]
    if (config["start"]["weights"] == STARTING_MODEL and channels > 1 and config["model"]["name"] == "unet-noisemap"
            and "per_channel" not in hyper):
        return dict(config, model=dict(config["model"], hyper=dict(hyper, per_channel=True)))
    return config


def resolve_start(config: dict[str, Any], scheme: str, model: torch.nn.Module, channels: int,
                  announce: Callable[[str], None]) -> dict[str, Any]:
    """Load the start's weights into ``model`` (built from the config) and describe the start.

    Returns the ``started_from`` record: ``weights`` (``starting-model``, ``random`` or ``earlier run``) and, as
    they apply, ``sha256`` of the weights file, ``path``, ``steps`` it was trained, and the ``reason`` for random
    weights. Raises ``ConfigError`` when the weights asked for cannot fit the data's channels or the model.
    """
    weights = config["start"]["weights"]
    if weights == RANDOM:
        announce("start: random weights (start.weights = \"random\")")
        return {"weights": RANDOM, "reason": "start.weights = \"random\""}
    if weights == STARTING_MODEL:
        return _from_starting_model(scheme, model, channels, announce)
    return _from_earlier_run(Path(weights), model, channels, announce)


def check_start_weights(config: dict[str, Any]) -> None:
    """Refuse, before any work (reading the data, measuring the step arithmetic), a ``start.weights`` path that
    names no checkpoint file and no run folder with a best checkpoint: one ``ConfigError`` naming the key."""
    weights = config["start"]["weights"]
    if weights in (STARTING_MODEL, RANDOM):
        return
    from grainwright.inference.common.errors import InputError
    from grainwright.models.checkpoint import resolve_checkpoint

    try:
        resolve_checkpoint(weights)
    except InputError as error:
        raise ConfigError(f"start.weights: {error} (give an earlier run folder or checkpoint of yours, "
                          f"\"{STARTING_MODEL}\" or \"{RANDOM}\")") from None


def fine_tuning_schedule(config: dict[str, Any], announce: Callable[[str], None]) -> dict[str, Any]:
    """The config with ``start.lr`` and ``start.warmup_fraction`` as the learning-rate schedule's peak and warm-up
    when the run starts from trained weights (``start.weights`` resolved, not ``random``): fine-tuning wants a
    lower peak and a short warm-up. The resolved ``optim`` table then records what the run used."""
    start = config["start"]
    if start["weights"] == RANDOM:
        return config
    optim = dict(config["optim"], lr=start["lr"], warmup_fraction=start["warmup_fraction"])
    announce(f"fine-tuning schedule: peak learning rate {start['lr']:g}, warm-up {start['warmup_fraction']:.0%} of "
             "the budget (start.lr, start.warmup_fraction)")
    return dict(config, optim=optim)


def _architecture_text(name: str, hyper: dict[str, Any]) -> str:
    shown = ", ".join(f"{key} {value}" for key, value in sorted(hyper.items()) if key != "per_channel")
    return f"{name} ({shown})"


def _from_starting_model(scheme: str, model: torch.nn.Module, channels: int,
                         announce: Callable[[str], None]) -> dict[str, Any]:
    from grainwright.models.starting import load_starting_model, starting_model_manifest

    payload = load_starting_model()
    expected = {key: value for key, value in payload["hyper"].items() if key != "per_channel"}
    actual = {key: model.hyper.get(key) for key in expected}
    if model.name != payload["architecture"] or actual != expected:
        why = ("scheme masked trains without the input-to-output skip the starting model has"
               if model.name == payload["architecture"] and actual == dict(expected, skip=False)
               else f"the configured architecture {_architecture_text(model.name, dict(model.hyper))} is not the "
                    f"starting model's {_architecture_text(payload['architecture'], expected)}")
        announce(f"start: random weights: {why} (fine-tuning needs the starting model's architecture; "
                 "start.weights = \"random\" says so explicitly)")
        return {"weights": RANDOM, "reason": why}
    if channels > 1 and not model.hyper.get("per_channel"):
        raise ConfigError(f"start.weights: the starting model is grayscale and the data have {channels} channels, "
                          "but model.hyper.per_channel = false; set model.hyper.per_channel = true (each channel "
                          "denoised on its own) or start.weights = \"random\"")
    model.load_state_dict(payload["state_dict"])
    manifest = starting_model_manifest()
    steps = manifest.get("total_steps", manifest.get("steps"))  # over all its stages
    announce(f"start: fine-tuning the shipped starting model ({payload['architecture']}, {steps} "
             f"steps, sha256 {manifest['weights_sha256'][:12]}...)"
             + (f"; each of the {channels} channels on its own" if channels > 1 else "")
             + "; start.weights = \"random\" trains from random weights")
    return {"weights": STARTING_MODEL, "sha256": manifest["weights_sha256"], "steps": steps}


def _from_earlier_run(path: Path, model: torch.nn.Module, channels: int,
                      announce: Callable[[str], None]) -> dict[str, Any]:
    from grainwright.models.checkpoint import load_checkpoint, resolve_checkpoint

    file = resolve_checkpoint(path)
    payload = load_checkpoint(file)
    theirs = int((payload.get("normalization") or {}).get("channels", payload["channels"]))
    if _single_frame_fits(payload, model) and theirs == channels:
        model.load_single_frame(payload["state_dict"])
        steps = (payload.get("training_summary") or {}).get("steps")
        announce(f"start: the single-frame model of the earlier run {file} ({payload.get('scheme')}, {steps} steps) "
                 f"on the centre frame, the {model.stack_frames - 1} neighbours' first-layer weights zero")
        return {"weights": EARLIER_RUN, "path": str(file), "sha256": hashlib.sha256(file.read_bytes()).hexdigest(),
                "steps": steps, "scheme": payload.get("scheme"), "inflated_from": payload["architecture"]}
    if payload["architecture"] != model.name or dict(payload["hyper"]) != dict(model.hyper) or theirs != channels:
        raise ConfigError(f"start.weights: {file} holds {_architecture_text(payload['architecture'], payload['hyper'])}"
                          f" for {theirs}-channel data; this run builds {_architecture_text(model.name, model.hyper)}"
                          f" for {channels}-channel data: give the earlier run's model settings, or set "
                          "start.weights = \"random\"")
    model.load_state_dict(payload["state_dict"])
    steps = (payload.get("training_summary") or {}).get("steps")
    announce(f"start: continuing from the earlier run {file} ({payload.get('scheme')}, {steps} steps)")
    return {"weights": EARLIER_RUN, "path": str(file), "sha256": hashlib.sha256(file.read_bytes()).hexdigest(),
            "steps": steps, "scheme": payload.get("scheme")}


def _single_frame_fits(payload: dict[str, Any], model: torch.nn.Module) -> bool:
    """Whether ``payload`` holds the single-frame ``unet-small`` a multi-frame ``unet-stack`` can start from: the
    same levels, width and skip (its K frames are the only difference)."""
    if getattr(model, "stack_frames", 1) == 1 or payload["architecture"] != "unet-small":
        return False
    frame_wise = {key: value for key, value in model.hyper.items() if key != "frames"}
    return dict(payload["hyper"]) == frame_wise


# -- held-out selection -----------------------------------------------------------------------------------------

def heldout_frames(images: list[dict[str, np.ndarray]], alignment: int, scheme: Any,
                   seed: int) -> list[dict[str, np.ndarray]]:
    """Up to ``HELDOUT_FRAMES`` held-out frames (working units, ``(H, W, C)``), centre crops of at most
    ``HELDOUT_EDGE`` pixels cut to multiples of ``alignment``; roles ``noisy`` and, with ground truth, ``clean``
    (clean images alone get the scheme's synthetic noise, drawn from a fixed seed)."""
    from grainwright.inference.images.crops import centre_crop

    rng = np.random.default_rng([seed, 2])
    frames = []
    for item in images[:HELDOUT_FRAMES]:
        crop = {}
        for role, array in item.items():
            if role in ("clean", "noisy"):
                window = centre_crop(array, HELDOUT_EDGE)
                height, width = (size // alignment * alignment for size in window.shape[:2])
                crop[role] = np.ascontiguousarray(window[:height, :width], dtype=np.float32)
        if not crop or 0 in next(iter(crop.values())).shape[:2]:
            continue
        if "noisy" not in crop:
            crop["noisy"] = np.asarray(scheme.noise.sample(crop["clean"][None], rng)[0], dtype=np.float32)
        frames.append(crop)
    return frames


def criterion_for(frames: list[dict[str, np.ndarray]], normalization: Any, noise: Any, scheme: Any) -> str:
    """``ground-truth`` with clean frames; ``sure-poisson-gaussian`` after the Anscombe transform; ``sure`` where
    the noise is Gaussian of known level in the working range; else ``j-invariant``."""
    if frames and "clean" in frames[0]:
        return "ground-truth"
    transform = (normalization.transform or {}).get("kind")
    if transform == "anscombe":
        return "sure-poisson-gaussian"
    gaussian = transform is None and getattr(noise, "kind", None) == "gaussian"
    return "sure" if gaussian and scheme.sigma is not None else "j-invariant"


def _denoiser(model: torch.nn.Module, scheme: Any) -> Callable[[np.ndarray], np.ndarray]:
    """``(H, W, C)`` working-range float -> the model's output, float32, with the noise level the scheme feeds."""
    def denoise(image: np.ndarray) -> np.ndarray:
        tensor = np.ascontiguousarray(np.asarray(image, dtype=np.float32).transpose(2, 0, 1)[None])
        level = scheme.noise_level({"noisy": tensor})
        with torch.no_grad():
            from grainwright.trainer.schemes.base import apply_model
            output = apply_model(model, torch.from_numpy(tensor), None if level is None else torch.from_numpy(level))
        return output[0].numpy().transpose(1, 2, 0)
    return denoise


def _before_the_transform(denoise: Callable[[np.ndarray], np.ndarray], noisy: np.ndarray, transform: dict[str, Any]
                          ) -> tuple[Callable[[np.ndarray], np.ndarray], np.ndarray]:
    """A working-domain denoiser and noisy frame seen before the Anscombe transform (fractions of the native
    range): the transform, the denoiser and the runtime's inverse chained, and the frame's untransformed values
    (the algebraic inverse undoes the transform of the noisy values exactly)."""
    from grainwright.inference.images.transforms import (
        anscombe_forward,
        anscombe_inverse_algebraic,
        anscombe_inverse_exact,
    )

    gain, read, offset, scale = (transform[key] for key in ("gain", "read", "offset", "scale"))

    def chained(linear: np.ndarray) -> np.ndarray:
        working = (anscombe_forward(linear, gain, read) - offset) / scale
        return anscombe_inverse_exact(np.asarray(denoise(working), np.float64) * scale + offset, gain, read)

    return chained, anscombe_inverse_algebraic(np.asarray(noisy, np.float64) * scale + offset, gain, read)


@dataclass(frozen=True)
class HeldoutScore:
    """A held-out figure (lower is better) and how it moves with the noise variance it assumes: scaled by ``s``,
    the figure is ``value + slope * (s - 1)`` (SURE is linear in the variance; ``slope = mean(v) * (2 *
    divergence - 1)``, Ramani et al. 2008, eq. 6). Zero slope for the criteria that do not assume a level."""

    value: float
    slope: float = 0.0

    def at(self, scale: float) -> float:
        return self.value + self.slope * (scale - 1.0)


def fine_tuned_is_better(start: HeldoutScore, fine_tuned: HeldoutScore, noise_margin: float) -> bool:
    """Whether the fine-tuned state scores lower than the start for every noise variance within ``noise_margin``
    (a fraction) of the one assumed: both figures are linear in the variance, so both ends of the band decide."""
    return all(fine_tuned.at(scale) < start.at(scale) for scale in (1.0 - noise_margin, 1.0 + noise_margin))


def _sure_score(estimate: Any, variance: np.ndarray) -> HeldoutScore:
    mean_variance = float(np.mean(variance))
    return HeldoutScore(estimate.mse, mean_variance * (2.0 * estimate.divergence - 1.0))


def heldout_score(model: torch.nn.Module, frames: list[dict[str, np.ndarray]], criterion: str, scheme: Any,
                  seed: int, normalization: Any = None) -> HeldoutScore:
    """Mean over ``frames`` of the criterion (an estimate of the mean squared error in working units, or before
    the Anscombe transform of ``normalization``, or the J-invariant loss; lower is better) for ``model`` in
    evaluation mode, with its dependence on the assumed noise variance."""
    from grainwright.inference.evaluation.calibration import j_invariant_loss
    from grainwright.inference.evaluation.sure import sure_mse, sure_mse_poisson_gaussian

    denoise = _denoiser(model, scheme)
    was_training = model.training
    model.eval()
    scores = []
    try:
        for index, frame in enumerate(frames):
            if criterion == "ground-truth":
                error = (denoise(frame["noisy"]) - frame["clean"]).astype(np.float64)
                scores.append(HeldoutScore(float(np.mean(error ** 2))))
            elif criterion == "sure":
                sigma = np.asarray(scheme.sigma, dtype=np.float64).reshape(-1)
                estimate = sure_mse(denoise, frame["noisy"], sigma, seed=seed + index)
                scores.append(_sure_score(estimate, sigma ** 2))
            elif criterion == "sure-poisson-gaussian":
                gain, read = normalization.transform["gain"], normalization.transform["read"]
                chained, linear = _before_the_transform(denoise, frame["noisy"], normalization.transform)
                estimate = sure_mse_poisson_gaussian(chained, linear, gain, read, seed=seed + index)
                scores.append(_sure_score(estimate, gain * np.maximum(linear, 0.0) + read * read))
            else:
                scores.append(HeldoutScore(j_invariant_loss(denoise, frame["noisy"])))
    finally:
        model.train(was_training)
    return HeldoutScore(float(np.mean([score.value for score in scores])),
                        float(np.mean([score.slope for score in scores])))
