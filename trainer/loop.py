"""The training loop: sample, step, validate, checkpoint, resume.

One step: draw a batch of patches (numpy, seeded), let the scheme add its random draws, compute its loss, step
Adam/AdamW with gradient clipping. The learning rate warms up linearly, then decays along a cosine to
``optim.final_lr_fraction`` of its peak; progress is the step count over ``budget.steps``, or the elapsed
fraction of ``budget.minutes``. Every ``validation.every_steps`` steps the model is scored on fixed held-out
patches (PSNR/SSIM against ground truth when there is any, else the scheme's own loss with fixed draws); the best
score is saved as ``checkpoints/best.pt`` (replaced by the final state when the budget completes, unless
``validation.keep_final`` is false) and a plateau stops the run. ``checkpoints/last.pt`` is saved every few
minutes (the first time after at most ``FIRST_SAVE_SECONDS``, and again after the first validation), at the end
and on SIGINT/SIGTERM, with the optimiser, schedule, random-generator states and step, so a resumed run continues
exactly where it stopped. A run killed without warning (``kill -9``, power loss) loses the steps since the last
save: at most ``FIRST_SAVE_SECONDS`` or the steps to the first validation early on, at most
``checkpoint.every_minutes`` later.
"""
from __future__ import annotations

import contextlib
import copy
import dataclasses
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
# Longest wait for the first last.pt after the one written before the first step (then checkpoint.every_minutes);
# a save of a small model takes well under a second.
FIRST_SAVE_SECONDS = 30.0


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
    # Held-out frames for keeping the better of the start and the end (grainwright.trainer.start), and whether the
    # run started from trained weights (the starting model or an earlier run) rather than random ones.
    heldout: list[dict[str, np.ndarray]] = field(default_factory=list)
    from_trained_weights: bool = False


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


def validation_scores(setup: TrainingSetup) -> dict[str, float]:
    """Score the model on the fixed validation batches.

    With ground truth: mean PSNR (dB) and SSIM of the output against the clean patches, in native units scaled
    to the native range (peak = range), via ``grainwright.inference.evaluation.metrics``; always: the scheme's own loss.
    """
    from grainwright.inference.evaluation.metrics import psnr, ssim

    model, scheme, norm = setup.model, setup.scheme, setup.normalization
    # Clean patches carry no speckle: their log goes back without the log-domain bias the output's inverse removes.
    clean_norm = norm
    if norm.transform and norm.transform.get("bias"):
        clean_norm = dataclasses.replace(norm, transform={key: value for key, value in norm.transform.items()
                                                          if key != "bias"})
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
                reference = clean_norm.from_working_float(clean.transpose(1, 2, 0))
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


@dataclass
class RunState:
    """Where a run stands. ``last.pt`` saves ``step`` and the rest (as its ``scheduler`` entry), so a resumed run
    continues exactly: the schedule's progress, the best validation so far and the stale count for the plateau."""

    step: int = 0
    elapsed: float = 0.0
    best: dict[str, float] | None = None
    best_step: int = 0
    stale: int = 0
    history: list[dict[str, float]] = field(default_factory=list)

    def scheduler(self) -> dict[str, Any]:
        return {"elapsed": self.elapsed, "best": self.best, "best_step": self.best_step, "stale": self.stale,
                "history": self.history}


class _Training:
    """One run's moving parts: model and optimiser, the random generators, the run state and the measured step
    rate; it knows the budget's progress and writes the checkpoints."""

    def __init__(self, setup: TrainingSetup, run: RunFolder, resume: dict[str, Any] | None) -> None:
        self.setup, self.run, self.config = setup, run, setup.config
        if setup.channels_last:
            setup.model.to(memory_format=torch.channels_last)
        self.optimizer = make_optimizer(setup.model, self.config["optim"])
        self.rng = np.random.default_rng(self.config["seed"])
        self.state = RunState()
        if resume is not None:
            setup.model.load_state_dict(resume["state_dict"])
            self.optimizer.load_state_dict(resume["optimizer"])
            self.rng.bit_generator.state = resume["rng"]["numpy"]
            torch.set_rng_state(resume["rng"]["torch"])
            for key, value in resume["scheduler"].items():
                setattr(self.state, key, value)
            self.state.step = resume["step"]
        self.budget_steps = self.config["budget"]["steps"]
        self.budget_seconds = self.config["budget"]["minutes"] * 60.0
        patch_pixels = self.config["data"]["patch_size"] ** 2 * self.config["data"]["batch_size"]
        self.flops_per_step = (2.0 * setup.model.macs_per_pixel() * patch_pixels
                               * setup.scheme.forward_passes_per_pixel)
        self.timed_steps, self.timed_seconds = 0, 0.0  # this session's steps only (not a resumed run's earlier)
        self.last_save = time.monotonic()
        self.saves_this_session = 0
        self.selection: dict[str, Any] | None = None

    def progress(self) -> float:
        """The fraction of the budget spent: steps over ``budget.steps``, else seconds over ``budget.minutes``."""
        if self.budget_steps:
            return self.state.step / self.budget_steps
        return self.state.elapsed / self.budget_seconds if self.budget_seconds > 0 else 1.0

    def set_learning_rate(self) -> float:
        rate = learning_rate(self.progress(), self.config["optim"])
        for group in self.optimizer.param_groups:
            group["lr"] = rate
        return rate

    def count_step(self, seconds: float) -> None:
        self.state.step += 1
        self.state.elapsed += seconds
        self.timed_steps += 1
        self.timed_seconds += seconds

    def summarise(self) -> dict[str, Any]:
        rate = self.timed_steps / self.timed_seconds if self.timed_seconds > 0 else 0.0
        return {"steps": self.state.step, "minutes": self.state.elapsed / 60.0, "best_step": self.state.best_step,
                "best_validation": self.state.best,
                "patches_per_second": rate * self.config["data"]["batch_size"],
                "gflops_per_second": rate * self.flops_per_step / 1e9, "validation_history": self.state.history,
                "selection": self.selection}

    def _payload(self, with_resume: bool, model: torch.nn.Module | None = None) -> dict[str, Any]:
        setup = self.setup
        content = checkpoint_payload(model or setup.model, setup.normalization, noise=setup.noise,
                                     scheme=setup.scheme.name,
                                     training_summary=dict(setup.summary, **self.summarise()),
                                     data_fingerprint=setup.data_fingerprint, training_noise=setup.training_noise)
        if with_resume:
            content.update(optimizer=self.optimizer.state_dict(), step=self.state.step,
                           scheduler=self.state.scheduler(),
                           rng={"numpy": self.rng.bit_generator.state, "torch": torch.get_rng_state()})
        return content

    def save_best(self) -> None:
        save_checkpoint(self.run.best, self._payload(with_resume=False))

    def save_start(self) -> None:
        """``start.pt``: the state training starts from, described like this run's checkpoints."""
        save_checkpoint(self.run.start, self._payload(with_resume=False))

    def keep_the_better_end(self) -> None:
        """Score the starting state and ``best.pt`` on the held-out frames and keep the better as ``best.pt``
        (``grainwright.trainer.start``); the figures and the verdict go into the summary."""
        from grainwright.models.checkpoint import load_checkpoint
        from grainwright.trainer.start import CRITERIA, criterion_for, fine_tuned_is_better, heldout_score

        setup = self.setup
        criterion = criterion_for(setup.heldout, setup.normalization, setup.noise, setup.scheme)
        scorer = copy.deepcopy(setup.model).to(memory_format=torch.contiguous_format)
        states = {"start": load_checkpoint(self.run.start)["state_dict"],
                  "end": load_checkpoint(self.run.best)["state_dict"]}
        scores = {}
        for name, state in states.items():
            scorer.load_state_dict(state)
            scores[name] = heldout_score(scorer, setup.heldout, criterion, setup.scheme, self.config["seed"],
                                         setup.normalization)
        margin = self.config["validation"]["noise_margin"]
        kept = "fine-tuned" if fine_tuned_is_better(scores["start"], scores["end"], margin) else "start"
        self.selection = {"criterion": CRITERIA[criterion], "start": scores["start"].value,
                          "fine_tuned": scores["end"].value, "kept": kept, "frames": len(setup.heldout),
                          "noise_margin": margin if scores["start"].slope or scores["end"].slope else 0.0}
        if self.selection["noise_margin"]:  # both figures at the ends of the band, lowest variance first
            for name, key in (("start", "start_across_margin"), ("end", "fine_tuned_across_margin")):
                self.selection[key] = [scores[name].at(1.0 - margin), scores[name].at(1.0 + margin)]
        scorer.load_state_dict(states["end" if kept == "fine-tuned" else "start"])
        save_checkpoint(self.run.best, self._payload(with_resume=False, model=scorer))

    def save_last(self) -> None:
        save_checkpoint(self.run.last, self._payload(with_resume=True))
        self.last_save = time.monotonic()
        self.saves_this_session += 1

    def save_last_when_due(self) -> None:
        """``last.pt`` every ``checkpoint.every_minutes`` of wall time; the first time after at most
        ``FIRST_SAVE_SECONDS``, so that a run killed early loses seconds of work, not a whole interval."""
        interval = self.config["checkpoint"]["every_minutes"] * 60.0
        if self.saves_this_session <= 1:  # only the save before the first step so far
            interval = min(interval, FIRST_SAVE_SECONDS)
        if time.monotonic() - self.last_save >= interval:
            self.save_last()

    def validation_due(self) -> bool:
        return bool(self.setup.validation) and self.state.step % self.config["validation"]["every_steps"] == 0

    def plateaued(self) -> bool:
        patience = self.config["validation"]["patience"]
        return bool(patience) and self.state.stale >= patience

    def validate(self, log: "_Log") -> None:
        """Score the model, log it, keep it as ``best.pt`` when it improves, count stale validations."""
        started = time.monotonic()
        state = self.state
        score = validation_scores(self.setup)
        state.history.append({"step": state.step, **score})
        log.validation(score, state.step)
        if _better(score, state.best, self.setup.ground_truth, self.config["validation"]["min_delta"]):
            state.best, state.best_step, state.stale = score, state.step, 0
            self.save_best()
        else:
            state.stale += 1
        state.elapsed += time.monotonic() - started
        if len(state.history) == 1:
            self.save_last()  # the first validation: a kill after it no longer loses every step

    def finish(self, stopped: str, log: "_Log") -> None:
        """The final checkpoints: a completed budget validates its final state (and by default keeps it as
        ``best.pt``); ``last.pt`` always holds the final state."""
        state, validating = self.state, bool(self.setup.validation)
        if validating and stopped == "budget" and not (state.history and state.history[-1]["step"] == state.step):
            self.validate(log)  # the final state competes for best.pt too
        if validating and stopped == "budget" and self.config["validation"]["keep_final"] \
                and state.best_step != state.step:
            # A few held-out patches cannot resolve the last small gains of the schedule: measured on held-out
            # images, the final state beat the best-validated one in every 10-minute benchmark run compared.
            state.best = {key: value for key, value in state.history[-1].items() if key != "step"}
            state.best_step = state.step
            self.save_best()
        if not validating or state.best is None:
            self.save_best()  # nothing to compare: the latest state is the best
        if stopped != "interrupted" and self.setup.from_trained_weights and self.setup.heldout \
                and self.run.start.is_file():
            self.keep_the_better_end()
        self.save_last()


class _Log:
    """The progress bar and the TensorBoard scalars (means over ``SCALAR_EVERY_STEPS`` steps) and images."""

    def __init__(self, setup: TrainingSetup, run: RunFolder, training: _Training) -> None:
        self.setup, self.training = setup, training
        config, step = setup.config, training.state.step
        self.batch_size = config["data"]["batch_size"]
        self.writer = None
        if config["logging"]["tensorboard"]:
            from torch.utils.tensorboard import SummaryWriter
            self.writer = SummaryWriter(str(run.root / "tensorboard"), purge_step=step or None)
        from tqdm import tqdm
        by_steps = bool(training.budget_steps)
        self.bar = tqdm(total=training.budget_steps or round(training.budget_seconds),
                        initial=step if by_steps else round(training.state.elapsed), unit="step" if by_steps else "s",
                        disable=not config["logging"]["progress"], dynamic_ncols=True, file=sys.stderr)
        self.window = {"loss": 0.0, "steps": 0, "seconds": 0.0}  # since the last TensorBoard scalars

    def step(self, loss: float, seconds: float, rate: float) -> None:
        """After a step: advance the bar; every ``SCALAR_EVERY_STEPS`` steps write the window's mean scalars."""
        state = self.training.state
        # Whole seconds on a time budget, so the bar reads "95/240 s" rather than a long fraction.
        self.bar.update(1 if self.training.budget_steps else max(0, round(state.elapsed) - self.bar.n))
        self.bar.set_postfix(loss=f"{loss:.3g}", patches_s=f"{self.batch_size / max(seconds, 1e-9):.0f}",
                             refresh=False)
        window = self.window
        window["loss"] += loss
        window["steps"] += 1
        window["seconds"] += seconds
        if window["steps"] < SCALAR_EVERY_STEPS:
            return
        if self.writer is not None:
            step_seconds = window["seconds"] / window["steps"]
            self.writer.add_scalar("train/loss", window["loss"] / window["steps"], state.step)
            self.writer.add_scalar("train/lr", rate, state.step)
            self.writer.add_scalar("speed/patches_per_second", self.batch_size / step_seconds, state.step)
            self.writer.add_scalar("speed/gflops_per_second", self.training.flops_per_step / step_seconds / 1e9,
                                   state.step)
        window.update(loss=0.0, steps=0, seconds=0.0)

    def validation(self, score: dict[str, float], step: int) -> None:
        if self.writer is not None:
            for key, value in score.items():
                self.writer.add_scalar(f"validation/{key}", value, step)
            _write_images(self.writer, self.setup, step)

    def close_bar(self) -> None:
        self.bar.close()

    def close(self) -> None:
        if self.writer is not None:
            self.writer.close()


def training_step(setup: TrainingSetup, optimizer: torch.optim.Optimizer, rng: np.random.Generator,
                  progress: float, step: int) -> torch.Tensor:
    """One optimisation step: draw a batch of patches, let the scheme add its random draws and compute its loss
    (bfloat16 autocast when asked), back-propagate, clip the gradients, update the weights. Returns the loss.

    Raises ``FloatingPointError`` when the loss is not finite (``step`` names where)."""
    data, optim = setup.config["data"], setup.config["optim"]
    patches = setup.train.sample(rng, data["batch_size"], data["patch_size"], data["augment"],
                                 data["flat_level"] if data["skip_flat"] else None)
    batch = to_tensors(setup.scheme.prepare(patches, rng), setup.channels_last)
    with step_precision(setup.precision):
        loss = setup.scheme.loss(setup.model, batch, progress)
    if not torch.isfinite(loss):
        raise FloatingPointError(f"the loss became {float(loss)} at step {step}; lower optim.lr")
    optimizer.zero_grad(set_to_none=True)
    loss.backward()
    if optim["grad_clip"] > 0:
        clip_gradients(setup.model, optim["grad_clip"])
    optimizer.step()
    return loss


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
    training = _Training(setup, run, resume)
    log = _Log(setup, run, training)
    if resume is None:
        training.save_last()  # resumable from the very start
        if setup.from_trained_weights:
            training.save_start()
    stopped = "budget"
    setup.model.train()
    with _StopRequest() as stop:
        while training.progress() < 1.0:
            started = time.monotonic()
            rate = training.set_learning_rate()
            loss = training_step(setup, training.optimizer, training.rng, training.progress(), training.state.step)
            seconds = time.monotonic() - started
            training.count_step(seconds)
            log.step(loss.item(), seconds, rate)
            if training.validation_due():
                training.validate(log)
                if training.plateaued():
                    stopped = "plateau"
                    break
            if stop.signal is not None or training.state.step == interrupt_at_step:
                stopped = "interrupted"
                break
            training.save_last_when_due()
    log.close_bar()
    training.finish(stopped, log)
    log.close()
    return dict(setup.summary, **training.summarise(), stopped=stopped)
