"""Training on generated data: the recipe of the shipped starting model.

The data is an endless stream rather than a folder: dead-leaves images
(:mod:`grainwright.inference.synthetic.dead_leaves`) mixed with scikit-image's sample photographs
(:mod:`grainwright.inference.synthetic.sample_images`, flipped, rotated and rescaled). The scheme is supervised
with additive white Gaussian noise whose standard deviation is drawn per patch, uniformly over
``[0, generated.sigma_max]`` (fractions of the range), and handed to the noise-map architecture as its level, so
one network covers the whole range (Zhang, Zuo and Zhang, "FFDNet", IEEE TIP 2018).

A recipe is a plain TOML file: the trainer's usual keys (``grainwright.trainer.config.SCHEMA``) plus a
``[generated]`` table (``GENERATED``). The loop, its schedule, checkpoints and resume are the trainer's own
(:func:`grainwright.trainer.loop.train`); only the data source and the scheme's noise draw are specific.

Determinism: patch positions, augmentations and noise come from the loop's seeded generator; the pool of
dead-leaves images is a function of the seed and the step (image ``k`` of the stream is drawn from its own
generator seeded with ``[seed, k]``), so a resumed run rebuilds exactly the pool it stopped with.
"""
from __future__ import annotations

import copy
import json
import platform
import time
import tomllib
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import torch

from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.images.normalization import Normalization
from grainwright.inference.synthetic.dead_leaves import DeadLeavesSettings, dead_leaves_image
from grainwright.inference.synthetic.sample_images import TRAINING, VALIDATION, rescaled_copies, sample_photo
from grainwright.models.checkpoint import RunFolder, load_checkpoint
from grainwright.models.registry import build_model, hyper_defaults
from grainwright.trainer.config import Key, _check_value, shipped_config, validate
from grainwright.trainer.data import PatchSource
from grainwright.trainer.loop import TrainingSetup, fastest_step, train
from grainwright.trainer.start import STARTING_MODEL, check_start_weights, fine_tuning_schedule, resolve_start
from grainwright.trainer.schemes.base import apply_model
from grainwright.trainer.schemes.supervised import Supervised

GENERATED: dict[str, Key] = {
    "sigma_max": Key("float", 75.0 / 255.0, "Largest Gaussian noise standard deviation, fraction of the range; "
                     "each patch draws its own uniformly from [0, sigma_max].", 0.0, 1.0),
    "photo_share": Key("float", 0.5, "Share of each batch cut from the sample photographs (the rest from "
                       "dead-leaves images).", 0.0, 1.0),
    "pool": Key("int", 48, "Dead-leaves images held at once.", 1, 4096),
    "refresh_every": Key("int", 4, "Steps between replacing the oldest dead-leaves image of the pool.", 1, 10**6),
    "image_size": Key("int", 256, "Edge of the dead-leaves images, pixels.", 16, 4096),
    "radius_min": Key("float", 1.0, "Smallest shape radius, pixels.", 0.1, 1e4),
    "radius_max": Key("float", 128.0, "Largest shape radius, pixels.", 0.2, 1e5),
    "texture_grains": Key("str", "0.7,1.5,3.0", "Grains of the shapes' random textures, pixels (comma-separated)."),
    "grating_fraction": Key("float", 0.0, "Share of shapes carrying an oriented periodic grating (tool marks, "
                            "weaves, line patterns).", 0.0, 1.0),
    "grating_min": Key("float", 0.005, "Smallest grating amplitude, fraction of the range (amplitudes are drawn "
                       "log-uniformly between grating_min and grating_max).", 1e-6, 1.0),
    "grating_max": Key("float", 0.15, "Largest grating amplitude, fraction of the range.", 1e-6, 1.0),
    "grating_period_min": Key("float", 2.5, "Shortest grating period, pixels.", 2.5, 1e4),
    "grating_period_max": Key("float", 16.0, "Longest grating period, pixels.", 2.5, 1e4),
    "level_weighting": Key("choice", "none", "Loss weight of each patch by its noise level: 'none' (plain mean "
                           "squared error, dominated by the high levels) or 'inverse' (each patch's squared error "
                           "divided by max(level, level_floor) ** level_exponent; exponent 1 gives about equal "
                           "weight per level in dB).",
                           choices=("none", "inverse")),
    "level_floor": Key("float", 2.0 / 255.0, "Smallest level used by level_weighting = 'inverse', fraction of "
                       "the range (patches drawn near zero noise would otherwise dominate).", 1e-6, 1.0),
    "level_exponent": Key("float", 1.0, "Exponent of the level in level_weighting = 'inverse': above 1 shifts "
                          "the weight towards the low levels.", 0.0, 4.0),
    "validation_images": Key("int", 8, "Dead-leaves images of their own seeds in the validation set.", 0, 1024),
    "validation_sigmas": Key("str", "10,25,50", "Noise levels of the validation set, in 1/255 of the range "
                             "(comma-separated)."),
}
VALIDATION_SEED_OFFSET = 1_000_003  # the validation images' stream index starts here: never a training image


def load_recipe(path: str | Path, assignments: list[str] = ()) -> dict[str, Any]:
    """Read a recipe: the trainer's keys (validated, defaults filled in) plus the ``[generated]`` table.

    ``assignments`` are ``key=value`` overrides in TOML syntax (``budget.steps=20``, ``generated.pool=4``).
    """
    path = Path(path)
    if not path.is_file() and path.parent == Path(".") and shipped_config(path.name) is not None:
        path = shipped_config(path.name)
    try:
        raw = tomllib.loads(path.read_text())
    except OSError as error:
        raise InputError(path, f"cannot read the recipe ({error.strerror})") from None
    except tomllib.TOMLDecodeError as error:
        raise InputError(path, f"not valid TOML: {error}") from None
    for assignment in assignments:
        key, _, value = assignment.partition("=")
        try:
            parsed = tomllib.loads(f"value = {value}")["value"]
        except tomllib.TOMLDecodeError:
            raise ConfigError(f"--set {assignment}: the value is not valid TOML") from None
        node = raw
        *parents, last = key.strip().split(".")
        for name in parents:
            node = node.setdefault(name, {})
        node[last] = parsed
    generated_raw = raw.pop("generated", {})
    generated = {name: copy.deepcopy(key.default) for name, key in GENERATED.items()}
    for name, value in generated_raw.items():
        if name not in GENERATED:
            raise ConfigError(f"generated.{name}: unknown key (known: {', '.join(GENERATED)})")
        generated[name] = _check_value(f"generated.{name}", GENERATED[name], value)
    if generated["radius_min"] >= generated["radius_max"]:
        raise ConfigError("generated.radius_min must be below generated.radius_max")
    if generated["grating_min"] > generated["grating_max"]:
        raise ConfigError("generated.grating_min must not exceed generated.grating_max")
    if generated["grating_period_min"] > generated["grating_period_max"]:
        raise ConfigError("generated.grating_period_min must not exceed generated.grating_period_max")
    texture_grains(generated)
    sigmas(generated)
    # The starting model is what other runs start from; its own recipe starts from random weights unless it says.
    raw.setdefault("start", {}).setdefault("weights", "random")
    config = validate(raw)
    if config["scheme"] != "supervised":
        raise ConfigError(f"scheme: the generated recipe trains 'supervised' only, got '{config['scheme']}'")
    return {**config, "generated": generated}


def _numbers(generated: dict[str, Any], key: str) -> list[float]:
    """A ``[generated]`` value of numbers separated by commas."""
    try:
        return [float(part) for part in str(generated[key]).split(",") if part.strip()]
    except ValueError:
        raise ConfigError(f"generated.{key}: expected numbers separated by commas, got {generated[key]!r}") from None


def sigmas(generated: dict[str, Any]) -> list[float]:
    """The validation noise levels, fractions of the range."""
    return [level / 255.0 for level in _numbers(generated, "validation_sigmas")]


def texture_grains(generated: dict[str, Any]) -> tuple[float, ...]:
    """The texture grains, pixels."""
    grains = tuple(_numbers(generated, "texture_grains"))
    if not grains or min(grains) <= 0:
        raise ConfigError(f"generated.texture_grains: expected positive numbers separated by commas, got "
                          f"{generated['texture_grains']!r}")
    return grains


def dead_leaves_settings(generated: dict[str, Any]) -> DeadLeavesSettings:
    return DeadLeavesSettings(size=generated["image_size"], radius_min=generated["radius_min"],
                              radius_max=generated["radius_max"], texture_grains=texture_grains(generated),
                              grating_fraction=generated["grating_fraction"], grating_min=generated["grating_min"],
                              grating_max=generated["grating_max"],
                              grating_period_min=generated["grating_period_min"],
                              grating_period_max=generated["grating_period_max"])


def stream_image(seed: int, index: int, settings: DeadLeavesSettings) -> np.ndarray:
    """Image ``index`` of the dead-leaves stream of ``seed`` (its own generator: any image can be redrawn)."""
    return dead_leaves_image(np.random.default_rng([seed, index]), settings)


class GeneratedPatches:
    """The training data as a patch source: a pool of dead-leaves images renewed every few steps, plus the
    sample photographs (a :class:`~grainwright.trainer.data.PatchSource`), one share of each batch from each.

    ``sample`` has the signature of ``PatchSource.sample``, so the trainer's loop uses it unchanged; it returns
    ``{"clean": (count, 1, size, size)}``.
    """

    channels = 1

    def __init__(self, seed: int, generated: dict[str, Any], photos: PatchSource, start_step: int = 0):
        self.seed, self.generated, self.photos = seed, generated, photos
        self.settings = dead_leaves_settings(generated)
        self.calls = start_step
        # At step s the pool holds stream images first .. first + pool - 1 (first = s // refresh_every), image k
        # in slot k % pool; every refresh_every steps the oldest gives way to the next one.
        pool = generated["pool"]
        self.first = start_step // generated["refresh_every"]
        self.images = np.empty((pool, self.settings.size, self.settings.size), dtype=np.float32)
        for index in range(self.first, self.first + pool):
            self.images[index % pool] = stream_image(seed, index, self.settings)

    def __len__(self) -> int:
        return len(self.images) + len(self.photos)

    def _advance(self) -> None:
        pool = len(self.images)
        while self.first < self.calls // self.generated["refresh_every"]:
            self.images[self.first % pool] = stream_image(self.seed, self.first + pool, self.settings)
            self.first += 1

    def sample(self, rng: np.random.Generator, count: int, size: int, augment: bool = True,
               flat_level: float | None = None) -> dict[str, np.ndarray]:
        self._advance()
        self.calls += 1
        from_photos = round(count * self.generated["photo_share"])
        parts = []
        if from_photos:
            parts.append(self.photos.sample(rng, from_photos, size, augment, flat_level)["clean"])
        leaves = count - from_photos
        if leaves:
            index = rng.integers(0, len(self.images), leaves)
            top = rng.integers(0, self.settings.size - size + 1, leaves)
            left = rng.integers(0, self.settings.size - size + 1, leaves)
            rows = top[:, None, None] + np.arange(size)[None, :, None]
            cols = left[:, None, None] + np.arange(size)[None, None, :]
            patches = self.images[index[:, None, None], rows, cols]
            if augment:  # the 8 flips / 90-degree rotations, as in PatchSource.sample
                code = rng.integers(0, 8, leaves)
                swap, flip_rows, flip_cols = ((code & bit).astype(bool) for bit in (4, 1, 2))
                patches[swap] = patches[swap].transpose(0, 2, 1)
                patches[flip_rows] = patches[flip_rows][:, ::-1]
                patches[flip_cols] = patches[flip_cols][:, :, ::-1]
            parts.append(patches[:, None])
        return {"clean": np.ascontiguousarray(np.concatenate(parts), dtype=np.float32)}


class LevelRangeSupervised(Supervised):
    """Supervised training with additive white Gaussian noise of a level drawn per patch, uniformly over
    ``[0, sigma_max]``; the level goes to the model as its noise map (batch key ``level``)."""

    name = "supervised"

    def __init__(self, config: dict[str, Any], sigma_max: float, level_weighting: str = "none",
                 level_floor: float = 2.0 / 255.0, level_exponent: float = 1.0):
        super().__init__(config, None, None, level_maps=True)
        self.sigma_max = float(sigma_max)
        self.level_weighting, self.level_floor = level_weighting, float(level_floor)
        self.level_exponent = float(level_exponent)

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator,
                levels: np.ndarray | None = None) -> dict[str, np.ndarray]:
        clean = patches["clean"]
        if levels is None:
            levels = rng.uniform(0.0, self.sigma_max, clean.shape[0])
        levels = np.asarray(levels, dtype=np.float32).reshape(-1, 1, 1, 1)
        noisy = clean + levels * rng.standard_normal(clean.shape, dtype=np.float32)
        level = np.broadcast_to(levels, (clean.shape[0], 1) + clean.shape[2:])
        return {"clean": clean, "noisy": np.ascontiguousarray(noisy, dtype=np.float32),
                "level": np.ascontiguousarray(level, dtype=np.float32)}

    def noise_level(self, batch: dict[str, np.ndarray]) -> np.ndarray | None:
        return batch.get("level")

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        if self.level_weighting == "none":
            return super().loss(model, batch, progress)
        # A good denoiser's squared error grows about in proportion to the level over this range (common practice,
        # no source: PSNR at 10, 25 and 50/255 is about 35, 31 and 28 dB), so dividing by the level gives each level
        # about the same weight in dB (a larger exponent favours the low levels, where classical filters are
        # strongest); the weights are normalised to mean 1 so the learning rate keeps its meaning.
        squared = (apply_model(model, batch["noisy"], batch["level"]) - batch["clean"]) ** 2
        weights = torch.clamp(batch["level"][:, :1, :1, :1], min=self.level_floor) ** -self.level_exponent
        return torch.mean(squared * (weights / weights.mean()))


def photo_source(names: tuple[str, ...]) -> PatchSource:
    """The sample photographs ``names`` at every scale of ``sample_images.SCALES``, as one patch source."""
    images = [copy_[..., None] for name in names for copy_ in rescaled_copies(sample_photo(name))]
    return PatchSource({"clean": images})


def validation_batches(recipe: dict[str, Any], scheme: LevelRangeSupervised) -> list[dict[str, np.ndarray]]:
    """Fixed validation batches: patches of dead-leaves images of their own seeds and of the held-out sample
    photographs (``sample_images.VALIDATION``), each at every level of ``generated.validation_sigmas``."""
    generated, data = recipe["generated"], recipe["data"]
    settings = dead_leaves_settings(generated)
    images = [stream_image(recipe["seed"], VALIDATION_SEED_OFFSET + k, settings)[..., None]
              for k in range(generated["validation_images"])]
    images += [sample_photo(name)[..., None] for name in VALIDATION]
    rng = np.random.default_rng([recipe["seed"], 1])
    patches = PatchSource({"clean": images}).sample(rng, recipe["validation"]["patches"], data["patch_size"],
                                                    augment=False)
    batches = []
    for sigma in sigmas(generated):
        for start in range(0, len(patches["clean"]), data["batch_size"]):
            chunk = {"clean": patches["clean"][start:start + data["batch_size"]]}
            batches.append(scheme.prepare(chunk, rng, levels=np.full(len(chunk["clean"]), sigma)))
    return batches


STARTING_NORMALIZATION = Normalization("float32", None, 0.0, 1.0, 1)


def prepare_generated(recipe: dict[str, Any], start_step: int = 0,
                      announce: Callable[[str], None] = print) -> TrainingSetup:
    """Everything the trainer's loop needs for ``recipe`` (see :func:`load_recipe`), starting at ``start_step``."""
    config = {key: value for key, value in recipe.items() if key != "generated"}
    generated = recipe["generated"]
    hyper = {**hyper_defaults(config["model"]["name"]), **config["model"]["hyper"], "skip": True}
    torch.manual_seed(config["seed"])
    model = build_model(config["model"]["name"], 1, **hyper)
    if not model.takes_noise_map:
        raise ConfigError(f"model.name: the generated recipe needs a noise-map architecture, got '{model.name}'")
    if config["data"]["patch_size"] % model.alignment or config["data"]["patch_size"] > generated["image_size"]:
        raise ConfigError(f"data.patch_size: {config['data']['patch_size']} must be a multiple of "
                          f"{model.alignment} and at most generated.image_size")
    started_from = None
    if config["start"]["weights"] != "random":  # a refinement of an earlier recipe run (same architecture)
        check_start_weights(config)
        started_from = resolve_start(config, "supervised", model, 1, announce)
        config = fine_tuning_schedule(config, announce)
    channels_last, precision = config["model"]["channels_last"], config["model"]["precision"]
    if "auto" in (channels_last, precision):
        layouts = (False, True) if channels_last == "auto" else (channels_last,)
        precisions = ("float32", "bfloat16") if precision == "auto" else (precision,)
        (channels_last, precision), seconds = fastest_step(model, 1, config["data"]["patch_size"],
                                                           config["data"]["batch_size"], layouts, precisions)
        announce("step arithmetic: " + ", ".join(f"{'channels-last' if layout else 'standard'} {kind} "
                                                 f"{value * 1e3:.0f} ms" for (layout, kind), value in seconds.items())
                 + f"; chosen {'channels-last' if channels_last else 'standard'} {precision}")
    config["model"] = dict(config["model"], skip=True, hyper=dict(model.hyper), channels_last=channels_last,
                           precision=precision)
    scheme = LevelRangeSupervised(config, generated["sigma_max"], generated["level_weighting"],
                                  generated["level_floor"], generated["level_exponent"])
    source = GeneratedPatches(config["seed"], generated, photo_source(TRAINING), start_step)
    summary = {"layout": "generated", "scheme": "supervised", "training_images": "dead-leaves stream + "
               f"{len(TRAINING)} sample photographs", "validation_images": len(VALIDATION)
               + generated["validation_images"], "data_folder": None, "transform": "none",
               "parameters": model.parameter_count(), "macs_per_pixel": model.macs_per_pixel(),
               "channels_last": channels_last, "precision": precision}
    if started_from is not None:
        summary["started_from"] = started_from
    return TrainingSetup(config=config, scheme=scheme, model=model, train=source,
                         validation=validation_batches(recipe, scheme), ground_truth=True,
                         normalization=STARTING_NORMALIZATION, channels_last=channels_last, precision=precision,
                         noise=None, data_fingerprint=None, summary=summary,
                         training_noise={"sigma_native": generated["sigma_max"] / 2,
                                         "sigma_native_range": [0.0, generated["sigma_max"]],
                                         "effective_bit_depth": None, "source": "uniform range of the recipe"})


def machine_description() -> dict[str, Any]:
    """The machine a run happened on: CPU model, logical CPUs, Python, torch, load average at the call."""
    import os

    cpu = platform.processor() or "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    load = os.getloadavg() if hasattr(os, "getloadavg") else None
    return {"cpu": cpu, "logical_cpus": os.cpu_count(), "python": platform.python_version(),
            "torch": torch.__version__, "load_average_1_5_15": list(load) if load else None}


def train_generated(recipe_path: str | Path, out: str | Path | None = None, *, resume: str | Path | None = None,
                    assignments: list[str] = (), interrupt_at_step: int | None = None,
                    announce: Callable[[str], None] = print) -> tuple[dict[str, Any], RunFolder]:
    """Train a recipe on generated data into the run folder ``out`` (or continue ``resume``).

    The run folder is the trainer's (``config.toml`` = the recipe resolved, ``checkpoints/last.pt`` and
    ``best.pt``, ``training-summary.json``) plus ``machine.json`` (one entry per start or resume).
    """
    from grainwright.inference.common.atomic import write_json_atomic
    from grainwright.inference.common.tomlio import write_toml

    state = None
    if resume is not None:
        run = RunFolder(Path(resume))
        if not run.last.is_file():
            raise InputError(run.root, "nothing to resume: checkpoints/last.pt is missing")
        recipe = load_recipe(run.config, list(assignments))
        state = load_checkpoint(run.last)
        if "step" not in state:
            raise InputError(run.last, "holds no resume state (optimizer, rng, step)")
    else:
        if out is None:
            raise ConfigError("--out DIR is required for a new run")
        recipe = load_recipe(recipe_path, list(assignments))
        run = RunFolder(Path(out))
        if run.root.exists() and any(run.root.iterdir()):
            raise InputError(run.root, "run folder exists and is not empty (choose another --out, or --resume it)")
    previous_threads = torch.get_num_threads()
    torch.set_num_threads(recipe["threads"] or torch.get_num_threads())
    try:
        setup = prepare_generated(recipe, 0 if state is None else state["step"], announce)
        if state is None:
            run.root.mkdir(parents=True, exist_ok=True)
            resolved = dict(setup.config, generated=recipe["generated"])
            write_toml(run.config, resolved, header="grainwright starting-model recipe, resolved (every key)")
        history_path = run.root / "machine.json"
        history = json.loads(history_path.read_text()) if history_path.is_file() else []
        history.append({"event": "resume" if state else "start", "step": 0 if state is None else state["step"],
                        "time": time.strftime("%Y-%m-%dT%H:%M:%S%z"), **machine_description(),
                        "torch_threads": torch.get_num_threads()})
        write_json_atomic(history_path, history)
        announce(f"generated data: dead-leaves stream + {len(TRAINING)} sample photographs; "
                 f"{setup.model.name} ({setup.model.parameter_count()} parameters, {setup.precision}); "
                 f"run folder {run.root}" + (f"; resuming at step {state['step']}" if state else ""))
        summary = train(setup, run, resume=state, interrupt_at_step=interrupt_at_step)
    finally:
        torch.set_num_threads(previous_threads)
    write_json_atomic(run.summary, summary, default=float)
    return summary, run



def _machine_entries(root: Path) -> list[dict[str, Any]]:
    return json.loads((root / "machine.json").read_text()) if (root / "machine.json").is_file() else []


def _earlier_stage(checkpoint: Path, started_from: dict[str, Any]) -> dict[str, Any]:
    """What the manifest keeps of the run a refinement started from: its resolved recipe, steps, wall time,
    machine entries and learning curve (read from its run folder when it is still there)."""
    root = checkpoint.parent.parent if checkpoint.parent.name == "checkpoints" else checkpoint.parent
    stage: dict[str, Any] = {"checkpoint_sha256": started_from.get("sha256"), "steps": started_from.get("steps")}
    if (root / "training-summary.json").is_file():
        summary = json.loads((root / "training-summary.json").read_text())
        stage.update(wall_time_minutes=summary.get("minutes"), validation_history=summary.get("validation_history"),
                     precision=summary.get("precision"))
    if (root / "config.toml").is_file():
        stage["resolved"] = tomllib.loads((root / "config.toml").read_text())
    stage["machine"] = _machine_entries(root)
    return stage


def _shipped_stages(started_from: dict[str, Any], recipe_stem: str) -> tuple[list[dict[str, Any]], str]:
    """The stages behind the shipped weights a refinement started from (read from their manifest, which must
    still be the one of those weights), and the command that reproduces all of them plus this one."""
    from grainwright.models.starting import starting_model_manifest

    shipped = starting_model_manifest()
    if shipped["weights_sha256"] != started_from.get("sha256"):
        raise ConfigError("the shipped starting model's manifest describes other weights than the run started "
                          "from; package the run before the shipped weights change")
    last = {"checkpoint_sha256": shipped["weights_sha256"], "steps": shipped["steps"],
            "wall_time_minutes": shipped["wall_time_minutes"], "validation_history": shipped["validation"]["history"],
            "precision": shipped["precision"], "resolved": shipped["recipe"]["resolved"],
            "machine": shipped["machine"]}
    stages = [*shipped.get("earlier_stages", []), last]
    previous = f"STAGE{len(stages)}_DIR"
    command = (shipped["recipe"]["command"].replace("RUN_DIR", previous) + "; grainwright starting-model train "
               f"--recipe {recipe_stem} --set start.weights='\"{previous}\"' --out RUN_DIR")
    return stages, command


def package_run(run_dir: str | Path, into: str | Path, recipe_path: str | Path = "starting-model",
                extra: dict[str, Any] | None = None) -> dict[str, Any]:
    """Write a finished recipe run as the shipped starting model: ``into/starting-model.pt`` (the run's
    ``best.pt``, which is its final state, without resume keys) and ``into/starting-model.json`` (the manifest).

    The manifest holds the recipe file verbatim and resolved, the command that reproduces the weights, the
    architecture, steps, wall time, the machine entries of the run (CPU, threads, load), the seed, the SHA-256 of
    the weights and the validation history; ``extra`` adds entries (e.g. benchmark figures).
    """
    import hashlib

    from grainwright.inference.common.atomic import write_json_atomic
    from grainwright.models.checkpoint import save_checkpoint
    from grainwright.models.starting import MANIFEST, WEIGHTS

    run = RunFolder(Path(run_dir))
    payload = load_checkpoint(run.best)
    summary = payload.get("training_summary") or {}
    recipe_file = Path(recipe_path)
    if not recipe_file.is_file() and shipped_config(recipe_file.name) is not None:
        recipe_file = shipped_config(recipe_file.name)
    recipe_text = recipe_file.read_text()
    resolved = tomllib.loads(run.config.read_text())
    if resolved["budget"]["steps"] != summary.get("steps"):
        raise ConfigError(f"{run.root}: the run stopped at step {summary.get('steps')} of its budget "
                          f"{resolved['budget']['steps']}; package a finished run")
    weights = save_checkpoint(Path(into) / WEIGHTS, payload)
    model = build_model(payload["architecture"], payload["channels"], **payload["hyper"])
    machine = _machine_entries(run.root)
    command = "grainwright starting-model train --out RUN_DIR"
    earlier = summary.get("started_from")
    stages = []
    if earlier and earlier.get("path"):  # refined from an earlier run: part of the weights' history and command
        stages = [_earlier_stage(Path(earlier["path"]), earlier)]
        command = ("grainwright starting-model train --out STAGE1_DIR; grainwright starting-model train --recipe "
                   f"{recipe_file.stem} --set start.weights='\"STAGE1_DIR\"' --out RUN_DIR")
    elif earlier and earlier.get("weights") == STARTING_MODEL:  # refined from the shipped weights: their stages
        stages, command = _shipped_stages(earlier, recipe_file.stem)
    manifest = {
        "name": "grainwright starting model",
        "weights_file": WEIGHTS,
        "weights_sha256": hashlib.sha256(weights.read_bytes()).hexdigest(),
        "weights_bytes": weights.stat().st_size,
        "architecture": model.describe(),
        "recipe": {"file": f"configs/{recipe_file.name}", "text": recipe_text, "resolved": resolved,
                   "command": command},
        "seed": resolved["seed"],
        "steps": summary.get("steps"),
        "total_steps": summary.get("steps", 0) + sum(stage.get("steps") or 0 for stage in stages),
        "wall_time_minutes": summary.get("minutes"),
        "precision": resolved["model"]["precision"],
        "threads": resolved["threads"],
        "machine": machine,
        "validation": {"set": f"{resolved['generated']['validation_images']} dead-leaves images of their own seeds "
                       f"and the sample photographs {', '.join(VALIDATION)}; {resolved['validation']['patches']} "
                       f"patches at each level {resolved['generated']['validation_sigmas']} (1/255); PSNR in dB",
                       "history": summary.get("validation_history")},
        "training_data": f"dead-leaves stream + scikit-image sample photographs {', '.join(TRAINING)}",
        "created": payload.get("created"),
        "tool_version": payload.get("tool_version"),
        **({"earlier_stages": stages} if stages else {}),
        **(extra or {}),
    }
    write_json_atomic(Path(into) / MANIFEST, manifest)
    return manifest
