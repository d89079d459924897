"""The training loop: sample, step, validate, checkpoint, resume.

One step: draw a batch of patches (numpy, seeded), let the scheme add its random draws, compute its loss, step
Adam/AdamW with gradient clipping. The learning rate warms up linearly, then decays along a cosine to
``optim.final_lr_fraction`` of its peak; progress is the step count over ``budget.steps``, or the elapsed
fraction of ``budget.minutes``. Every ``validation.every_steps`` steps the model is scored on fixed held-out
patches (PSNR/SSIM against ground truth when there is any, else the scheme's own loss with fixed draws); the best
score is saved as ``checkpoints/best.pt`` (replaced by the final state when the budget completes, unless
``validation.keep_final`` is false) and a plateau stops the run. ``checkpoints/last.pt`` is saved every few
minutes, at the end and on SIGINT/SIGTERM, with the optimiser, schedule, random-generator states and step, so a
resumed run continues exactly where it stopped.
"""
from __future__ import annotations

import contextlib
import copy
import math
import signal
import sys
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch

from grainwright.models.checkpoint import RunFolder, checkpoint_payload, save_checkpoint
from grainwright.trainer.data import PatchSource
from grainwright.trainer.schemes.base import Scheme, apply_model

# TensorBoard scalars are means over this many steps: writing four events every step cost ~1% of a step.
SCALAR_EVERY_STEPS = 10


@dataclass
class TrainingSetup:
    """Everything one run needs, decided before the loop starts (see :func:`grainwright.trainer.run.prepare`)."""

    config: dict[str, Any]
    scheme: Scheme
    model: torch.nn.Module
    train: PatchSource
    validation: list[dict[str, np.ndarray]]
    ground_truth: bool
    normalization: Any
    channels_last: bool = False
    precision: str = "float32"
    noise: Any = None
    data_fingerprint: str | None = None
    training_noise: dict[str, Any] | None = None
    summary: dict[str, Any] = field(default_factory=dict)


def learning_rate(progress: float, optim: dict[str, Any]) -> float:
    """Linear warm-up over ``warmup_fraction`` of the budget, then cosine decay to ``final_lr_fraction``."""
    peak, warm, final = optim["lr"], optim["warmup_fraction"], optim["final_lr_fraction"]
    progress = min(max(progress, 0.0), 1.0)
    if progress < warm:
        return peak * progress / warm
    decay = (progress - warm) / max(1e-12, 1.0 - warm)
    return peak * (final + (1.0 - final) * 0.5 * (1.0 + math.cos(math.pi * decay)))


def make_optimizer(model: torch.nn.Module, optim: dict[str, Any]) -> torch.optim.Optimizer:
    # fused: one kernel for the whole update instead of a Python loop over tensors (PyTorch's CPU default);
    # measured 0.35 against 1.05 ms per step for the default U-Net's 263k weights.
    kind = torch.optim.AdamW if optim["optimizer"] == "adamw" else torch.optim.Adam
    return kind(model.parameters(), lr=optim["lr"], weight_decay=optim["weight_decay"], fused=True)


def clip_gradients(model: torch.nn.Module, max_norm: float) -> None:
    """Scale the gradients down to a total L2 norm of ``max_norm`` when they exceed it (no pass when not)."""
    gradients = [p.grad for p in model.parameters() if p.grad is not None]
    norm = torch.nn.utils.get_total_norm(gradients, foreach=True)
    if norm > max_norm:
        torch.nn.utils.clip_grads_with_norm_(model.parameters(), max_norm, norm, foreach=True)


def to_tensors(batch: dict[str, np.ndarray], channels_last: bool = False) -> dict[str, torch.Tensor]:
    """Numpy batch -> tensors (sharing memory); 4-D tensors in channels-last layout when asked."""
    tensors = {key: torch.from_numpy(value) for key, value in batch.items()}
    if channels_last:
        tensors = {key: value.contiguous(memory_format=torch.channels_last) if value.dim() == 4 else value
                   for key, value in tensors.items()}
    return tensors


def step_precision(precision: str) -> contextlib.AbstractContextManager:
    """The context of one training step's forward pass: bfloat16 autocast (weights, gradients and optimiser stay
    float32) or nothing."""
    if precision == "bfloat16":
        return torch.autocast("cpu", dtype=torch.bfloat16)
    return contextlib.nullcontext()


def fastest_step(model: torch.nn.Module, channels: int, patch_size: int, batch_size: int,
                 layouts: tuple[bool, ...] = (False, True), precisions: tuple[str, ...] = ("float32", "bfloat16"),
                 repeats: int = 3) -> tuple[tuple[bool, str], dict[tuple[bool, str], float]]:
    """The fastest tensor layout and precision for forward+backward passes of (a copy of) ``model``, measured
    on this machine: ``repeats`` timed steps per combination, alternated, after one warm-up step each.

    Returns the winning ``(channels_last, precision)`` and the median seconds per step of every combination.
    Measured rather than assumed: channels-last and bfloat16 help on some CPUs and hurt on others (bfloat16 is
    emulated, hence slow, without native support).
    """
    generator = torch.Generator().manual_seed(0)
    image = torch.rand(batch_size, channels, patch_size, patch_size, generator=generator)
    level = torch.full((batch_size, 1, patch_size, patch_size), 0.1)
    combos = [(layout, precision) for layout in layouts for precision in precisions]
    copies = {layout: copy.deepcopy(model).to(memory_format=torch.channels_last) if layout else copy.deepcopy(model)
              for layout in layouts}
    inputs = {layout: image.contiguous(memory_format=torch.channels_last) if layout else image for layout in layouts}
    times: dict[tuple[bool, str], list[float]] = {combo: [] for combo in combos}
    for attempt in range(repeats + 1):
        for layout, precision in combos:
            started = time.perf_counter()
            with step_precision(precision):
                output = apply_model(copies[layout], inputs[layout], level)
            torch.mean((output - inputs[layout]) ** 2).backward()
            if attempt:
                times[(layout, precision)].append(time.perf_counter() - started)
    medians = {combo: float(np.median(values)) for combo, values in times.items()}
    return min(medians, key=medians.get), medians


def evaluate(setup: TrainingSetup) -> dict[str, float]:
    """Score the model on the fixed validation batches.

    With ground truth: mean PSNR (dB) and SSIM of the output against the clean patches, in native units scaled
    to the native range (peak = range), via ``grainwright.inference.evaluation.metrics``; always: the scheme's own loss.
    """
    from grainwright.inference.evaluation.metrics import psnr, ssim

    model, scheme, norm = setup.model, setup.scheme, setup.normalization
    scores: dict[str, list[float]] = {"loss": [], "psnr": [], "ssim": []}
    span = float(norm.high - norm.low)
    model.eval()
    with torch.no_grad():
        for batch in setup.validation:
            tensors = to_tensors(batch, setup.channels_last)
            scores["loss"].append(float(scheme.validation_loss(model, tensors)))
            if not setup.ground_truth:
                continue
            level = scheme.noise_level(batch)
            output = apply_model(model, tensors["noisy"], None if level is None else torch.from_numpy(level))
            for clean, denoised in zip(batch["clean"], output.contiguous().numpy()):
                reference = norm.from_working_float(clean.transpose(1, 2, 0))
                test = norm.from_working_float(denoised.transpose(1, 2, 0))
                scores["psnr"].append(float(psnr(reference, test, peak=span)))
                scores["ssim"].append(float(ssim(reference, test, data_range=span)))
    model.train()
    return {key: float(np.mean(values)) for key, values in scores.items() if values}


def _better(score: dict[str, float], best: dict[str, float] | None, ground_truth: bool, min_delta: float) -> bool:
    if best is None:
        return True
    if ground_truth:
        return score["psnr"] > best["psnr"] + min_delta
    return score["loss"] < best["loss"] - min_delta


class _StopRequest:
    """Turns SIGINT/SIGTERM into a flag the loop checks after each step (then it saves and stops)."""

    def __init__(self) -> None:
        self.signal: int | None = None
        self._previous: dict[int, Any] = {}

    def __enter__(self) -> "_StopRequest":
        for number in (signal.SIGINT, signal.SIGTERM):
            try:
                self._previous[number] = signal.signal(number, self._handle)
            except ValueError:  # not the main thread: no signal handling
                pass
        return self

    def _handle(self, number: int, frame: Any) -> None:
        self.signal = number

    def __exit__(self, *exc: Any) -> None:
        for number, handler in self._previous.items():
            signal.signal(number, handler)


def _write_images(writer: Any, setup: TrainingSetup, step: int) -> None:
    """Noisy / output / residual of the first validation patch, channel 0 (or RGB), clipped to [0, 1]."""
    batch = {key: value[:1] for key, value in setup.validation[0].items()}
    level = setup.scheme.noise_level(batch)
    setup.model.eval()
    with torch.no_grad():
        output = apply_model(setup.model, torch.from_numpy(batch["noisy"]),
                             None if level is None else torch.from_numpy(level))[0].contiguous().numpy()
    setup.model.train()
    noisy = batch["noisy"][0]
    shown = slice(0, 3) if noisy.shape[0] == 3 else slice(0, 1)
    for name, image in (("noisy", noisy), ("output", output), ("residual", noisy - output + 0.5)):
        writer.add_image(f"validation/{name}", np.clip(image[shown], 0.0, 1.0), step, dataformats="CHW")


def train(setup: TrainingSetup, run: RunFolder, resume: dict[str, Any] | None = None,
          interrupt_at_step: int | None = None) -> dict[str, Any]:
    """Train ``setup.model`` and write ``run``'s checkpoints; return the training summary.

    Parameters
    ----------
    setup : TrainingSetup
        Model, scheme, data and resolved config.
    run : RunFolder
        The run folder (already holding ``config.toml``).
    resume : dict, optional
        A loaded ``checkpoints/last.pt`` payload: weights, optimiser, schedule, random-generator states and step
        are restored and training continues exactly.
    interrupt_at_step : int, optional
        Stop at this step as if interrupted (saving ``last.pt``); used by tests.
    """
    config = setup.config
    model, scheme, optim = setup.model, setup.scheme, config["optim"]
    budget_steps, budget_seconds = config["budget"]["steps"], config["budget"]["minutes"] * 60.0
    if setup.channels_last:
        model.to(memory_format=torch.channels_last)
    optimizer = make_optimizer(model, optim)
    rng = np.random.default_rng(config["seed"])
    state = {"step": 0, "elapsed": 0.0, "best": None, "best_step": 0, "stale": 0, "history": []}
    if resume is not None:
        model.load_state_dict(resume["state_dict"])
        optimizer.load_state_dict(resume["optimizer"])
        rng.bit_generator.state = resume["rng"]["numpy"]
        torch.set_rng_state(resume["rng"]["torch"])
        state.update(resume["scheduler"])
        state["step"] = resume["step"]

    def progress() -> float:
        if budget_steps:
            return state["step"] / budget_steps
        return state["elapsed"] / budget_seconds if budget_seconds > 0 else 1.0

    def payload(with_resume: bool) -> dict[str, Any]:
        summary = dict(setup.summary, **summarise())
        content = checkpoint_payload(model, setup.normalization, noise=setup.noise, scheme=scheme.name,
                                     training_summary=summary, data_fingerprint=setup.data_fingerprint,
                                     training_noise=setup.training_noise)
        if with_resume:
            content.update(optimizer=optimizer.state_dict(), step=state["step"],
                           scheduler={key: state[key] for key in ("elapsed", "best", "best_step", "stale", "history")},
                           rng={"numpy": rng.bit_generator.state, "torch": torch.get_rng_state()})
        return content

    patch_pixels = config["data"]["patch_size"] ** 2 * config["data"]["batch_size"]
    flops_per_step = 2.0 * model.macs_per_pixel() * patch_pixels * scheme.forward_passes_per_pixel
    timing = {"steps": 0, "seconds": 0.0}

    def summarise() -> dict[str, Any]:
        rate = timing["steps"] / timing["seconds"] if timing["seconds"] > 0 else 0.0
        return {"steps": state["step"], "minutes": state["elapsed"] / 60.0, "best_step": state["best_step"],
                "best_validation": state["best"], "patches_per_second": rate * config["data"]["batch_size"],
                "gflops_per_second": rate * flops_per_step / 1e9, "validation_history": state["history"]}

    writer = None
    if config["logging"]["tensorboard"]:
        from torch.utils.tensorboard import SummaryWriter
        writer = SummaryWriter(str(run.root / "tensorboard"), purge_step=state["step"] or None)

    from tqdm import tqdm
    bar = tqdm(total=budget_steps or round(budget_seconds), initial=state["step"] if budget_steps else
               round(state["elapsed"]), unit="step" if budget_steps else "s", disable=not config["logging"]["progress"],
               dynamic_ncols=True, file=sys.stderr)
    every_val, patience = config["validation"]["every_steps"], config["validation"]["patience"]
    save_every = config["checkpoint"]["every_minutes"] * 60.0
    def validate() -> None:
        """Score the model, log it, keep it as ``best.pt`` when it improves, count stale validations."""
        validation_started = time.monotonic()
        score = evaluate(setup)
        state["history"].append({"step": state["step"], **score})
        if writer is not None:
            for key, value in score.items():
                writer.add_scalar(f"validation/{key}", value, state["step"])
            _write_images(writer, setup, state["step"])
        if _better(score, state["best"], setup.ground_truth, config["validation"]["min_delta"]):
            state["best"], state["best_step"], state["stale"] = score, state["step"], 0
            save_checkpoint(run.best, payload(with_resume=False))
        else:
            state["stale"] += 1
        state["elapsed"] += time.monotonic() - validation_started

    if resume is None:
        save_checkpoint(run.last, payload(with_resume=True))  # resumable from the very start
    last_save = time.monotonic()
    logged = {"loss": 0.0, "steps": 0, "seconds": 0.0}  # since the last TensorBoard scalars
    stopped = "budget"
    model.train()
    with _StopRequest() as stop:
        while progress() < 1.0:
            started = time.monotonic()
            rate_now = learning_rate(progress(), optim)
            for group in optimizer.param_groups:
                group["lr"] = rate_now
            patches = setup.train.sample(rng, config["data"]["batch_size"], config["data"]["patch_size"],
                                         config["data"]["augment"],
                                         config["data"]["flat_level"] if config["data"]["skip_flat"] else None)
            batch = to_tensors(scheme.prepare(patches, rng), setup.channels_last)
            with step_precision(setup.precision):
                loss = scheme.loss(model, batch, progress())
            if not torch.isfinite(loss):
                raise FloatingPointError(f"the loss became {float(loss)} at step {state['step']}; lower optim.lr")
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            if optim["grad_clip"] > 0:
                clip_gradients(model, optim["grad_clip"])
            optimizer.step()
            seconds = time.monotonic() - started
            state["step"] += 1
            state["elapsed"] += seconds
            timing["steps"] += 1
            timing["seconds"] += seconds
            # Whole seconds on a time budget, so the bar reads "95/240 s" rather than a long fraction.
            bar.update(1 if budget_steps else max(0, round(state["elapsed"]) - bar.n))
            rate = config["data"]["batch_size"] / max(seconds, 1e-9)
            loss_value = loss.item()
            bar.set_postfix(loss=f"{loss_value:.3g}", patches_s=f"{rate:.0f}", refresh=False)
            logged["loss"] += loss_value
            logged["steps"] += 1
            logged["seconds"] += seconds
            if logged["steps"] == SCALAR_EVERY_STEPS:
                if writer is not None:
                    step_seconds = logged["seconds"] / logged["steps"]
                    writer.add_scalar("train/loss", logged["loss"] / logged["steps"], state["step"])
                    writer.add_scalar("train/lr", rate_now, state["step"])
                    writer.add_scalar("speed/patches_per_second", config["data"]["batch_size"] / step_seconds,
                                      state["step"])
                    writer.add_scalar("speed/gflops_per_second", flops_per_step / step_seconds / 1e9, state["step"])
                logged.update(loss=0.0, steps=0, seconds=0.0)

            if setup.validation and state["step"] % every_val == 0:
                validate()
                if patience and state["stale"] >= patience:
                    stopped = "plateau"
                    break
            if stop.signal is not None or state["step"] == interrupt_at_step:
                stopped = "interrupted"
                break
            if time.monotonic() - last_save >= save_every:
                save_checkpoint(run.last, payload(with_resume=True))
                last_save = time.monotonic()
    bar.close()
    validated = bool(state["history"]) and state["history"][-1]["step"] == state["step"]
    if setup.validation and stopped == "budget" and not validated:
        validate()  # the final state competes for best.pt too
    if setup.validation and stopped == "budget" and config["validation"]["keep_final"] \
            and state["best_step"] != state["step"]:
        # A few held-out patches cannot resolve the last small gains of the schedule: measured on held-out
        # images, the final state beat the best-validated one in every 10-minute benchmark run compared.
        state["best"] = {key: value for key, value in state["history"][-1].items() if key != "step"}
        state["best_step"] = state["step"]
        save_checkpoint(run.best, payload(with_resume=False))
    if not setup.validation or state["best"] is None:
        save_checkpoint(run.best, payload(with_resume=False))  # nothing to compare: the latest state is the best
    save_checkpoint(run.last, payload(with_resume=True))
    if writer is not None:
        writer.close()
    return dict(setup.summary, **summarise(), stopped=stopped)
