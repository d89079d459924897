"""The training configuration: one schema, plain-TOML files, strict validation.

A config is a nested dict of plain values (what ``tomllib`` returns). Every key has one entry in ``SCHEMA`` with
its type, default, allowed range and meaning; unknown keys, wrong types and out-of-range values are rejected
with the key path and, for a misspelt key or choice, the closest valid spelling. The config reference in
docs/configs.md is rendered from ``SCHEMA`` by ``schema_markdown`` (a test keeps the two identical).
"""
from __future__ import annotations

import copy
import tomllib
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.common.suggest import did_you_mean
from grainwright.inference.images.alignment import ALIGNMENTS
from grainwright.trainer.schemes.registry import SCHEMES

# The registry's schemes: a new scheme is one file plus one line in trainer/schemes/registry.py.
SCHEME_NAMES = ("auto", *SCHEMES)


@dataclass(frozen=True)
class Key:
    """One configuration key.

    ``kind`` is ``"int"``, ``"float"``, ``"bool"``, ``"str"``, ``"choice"``, ``"bool-or-auto"``,
    ``"float-or-auto"`` (a number in range, or ``"auto"``) or ``"table"`` (a free table passed through, e.g.
    architecture hyper-parameters checked by the model itself).
    """

    kind: str
    default: Any
    doc: str
    low: float | None = None
    high: float | None = None
    choices: tuple[str, ...] = ()


SCHEMA: dict[str, dict[str, Key] | Key] = {
    "scheme": Key("choice", "auto", "Training scheme; `auto` picks one from the data layout and says why.",
                  choices=SCHEME_NAMES),
    "seed": Key("int", 0, "Seed of every random draw (initial weights, patches, noise, masks).", 0, 2**31 - 1),
    "threads": Key("int", 0, "Torch threads; 0 = the number of physical cores.", 0, 256),
    "model": {
        "name": Key("str", "residual", "Architecture name from the model registry."),
        "skip": Key("bool-or-auto", "auto",
                    "Input-to-output skip; `auto` = off for `masked` (required there), on otherwise."),
        "hyper": Key("table", {}, "Architecture hyper-parameters (e.g. `depth`, `width`), checked by the model."),
        "channels_last": Key("bool-or-auto", "auto", "Channels-last tensor layout; `auto` = whichever runs faster "
                             "in a short measurement at the start (the choice is recorded in the run's config)."),
        "precision": Key("choice", "auto", "Arithmetic of the training steps: `bfloat16` = mixed precision "
                         "(float32 weights and loss, bfloat16 convolutions), several times faster on CPUs with "
                         "native bfloat16 (AVX512-BF16, AMX); `auto` = whichever runs faster in the same start-up "
                         "measurement (recorded in the run's config). Validation and export stay float32.",
                         choices=("auto", "float32", "bfloat16")),
        "align_neighbours": Key("choice", "none", "Multi-frame models: `optical-flow` warps each neighbour onto "
                                "the centre frame before the model sees it (dense optical flow estimated on the "
                                "noisy frames, iterative Lucas-Kanade; motion compensation as in Ehret et al., CVPR "
                                "2019), in training and at run time (recorded in the exported model); for scenes "
                                "that move. `dominant-shifts` = each neighbour moved by whole pixels, each pixel "
                                "taking one of a few translations found by phase correlation: for rigid motion "
                                "(a conveyor, a stage), a small part of the optical flow's cost. `none` = the "
                                "frames as they are (volumes, still scenes).",
                                choices=ALIGNMENTS),
    },
    "start": {
        "weights": Key("str", "starting-model", "Where training starts: `starting-model` = the shipped starting "
                       "model (fine-tuning; when the architecture is its `unet-noisemap` with 3 levels of width 16, "
                       "else random weights, said at the start), `random` = random weights, or the path of an "
                       "earlier run folder or checkpoint of yours (continue fitting on new frames; architecture and "
                       "channels must match). The run keeps the better of its start and its end on held-out frames "
                       "and records which (`training-summary.json`: `started_from`, `selection`)."),
        "lr": Key("float", 5e-4, "Peak learning rate when the run starts from trained weights (the starting model "
                  "or an earlier run); it replaces `optim.lr`, which applies to random weights. Measured at 10 "
                  "minutes on the frames to be denoised, float32, 3 seeds (docs/benchmarks.md): 5e-4 beat 2e-4 by "
                  "0.02 dB on Gaussian and 0.04 dB on Poisson-Gaussian noise in the mean; 1e-3 and 2e-3 did worse "
                  "at fixed step counts.", 1e-7, 1.0),
        "warmup_fraction": Key("float", 0.01, "Share of the budget spent warming up when the run starts from "
                               "trained weights (replaces `optim.warmup_fraction`).", 0.0, 0.5),
    },
    "data": {
        "folder": Key("str", "", "Data folder (set by `--data`; recorded so that `--resume` finds it)."),
        "patch_size": Key("int", 64, "Edge of the square training patches, pixels.", 8, 1024),
        "batch_size": Key("int", 16, "Patches per step.", 1, 4096),
        "augment": Key("bool", True, "Random flips and 90-degree rotations of each patch."),
        "skip_flat": Key("bool", False, "Redraw patches whose standard deviation is below `data.flat_level`."),
        "flat_level": Key("float", 0.005, "Standard deviation (working units, fraction of range) below which "
                          "a patch counts as flat background.", 0.0, 1.0),
        "validation_fraction": Key("float", 0.2, "Share held out for validation: of the images, or of each "
                                   "image's rows with `data.validation_split = \"regions\"`.", 0.0, 0.9),
        "validation_split": Key("choice", "images", "What is held out for validation and the never-worse "
                                "check: `images` = whole images (a single image is split into two regions); "
                                "`regions` = the last rows (columns, if wider than tall) of every image, so that "
                                "every image trains and the check sees every kind of frame: for a few unlike "
                                "frames, or when the frames to denoise are the training frames.",
                                choices=("images", "regions")),
        "focus_frames": Key("str", "", "File-name pattern (shell wildcards, e.g. `scored-*` or `line3-*.tif`) of "
                            "the frames the model is for, when they train among others: they get "
                            "`data.focus_share` of the training patches whatever their number (their noisy values "
                            "only, as every frame's), so that a short fine-tune spends more of its steps on the "
                            "frames to be denoised. Empty = every frame in proportion to its size."),
        "focus_share": Key("float", 0.5, "Share of the training patches drawn from the frames of "
                           "`data.focus_frames` (1 = those frames only).", 0.01, 1.0),
        "bit_depth": Key("int", 0, "Effective bit depth of integer data; 0 = detect from the data.", 0, 16),
        "fixed_pattern": Key("choice", "auto", "Row/column fixed-pattern correction before training: `auto` = "
                             "when the banding or correlation flag is raised.", choices=("auto", "always", "never")),
        "transform": Key("choice", "auto", "Variance-stabilising transform of the working range: `auto` = "
                         "what the noise calls for (from `noise.toml`, else from the same analysis as `inspect`): "
                         "generalized Anscombe for Poisson-Gaussian noise, log for gamma speckle (with the "
                         "log-domain bias of noisy targets removed on the way back), none for Gaussian noise and "
                         "for `supervised`.", choices=("auto", "none", "anscombe", "log")),
        "stack_axis": Key("choice", "auto", "Multi-frame models: the axis the training stacks run along, recorded "
                          "in the exported model (`Z` slices of a volume, `T` time points of a sequence, `I` "
                          "unstated); `auto` = the axis the stacks' own metadata (ImageJ, OME) give when they all "
                          "agree, else `I`.", choices=("auto", "Z", "T", "I")),
    },
    "noise": {
        "file": Key("str", "", "Noise description (TOML, from `grainwright inspect --save-noise`); empty = "
                    "`noise.toml` in the data folder if present, else estimated where a scheme needs it."),
    },
    "optim": {
        "optimizer": Key("choice", "adam", "Optimiser.", choices=("adam", "adamw")),
        "lr": Key("float", 1e-3, "Peak learning rate.", 1e-7, 1.0),
        "weight_decay": Key("float", 0.0, "Weight decay (decoupled for `adamw`).", 0.0, 1.0),
        "warmup_fraction": Key("float", 0.03, "Share of the budget spent warming up linearly from zero.", 0.0, 0.5),
        "final_lr_fraction": Key("float", 0.01, "Learning rate at the end of the cosine decay, as a share of "
                                 "`optim.lr`.", 0.0, 1.0),
        "grad_clip": Key("float", 1.0, "Maximum gradient norm; 0 = no clipping.", 0.0, 1e6),
    },
    "budget": {
        "steps": Key("int", 0, "Optimiser steps; the schedule follows the step count. 0 = use `budget.minutes`.",
                     0, 10**9),
        "minutes": Key("float", 10.0, "Wall-clock minutes when `budget.steps` is 0; the schedule follows the "
                       "elapsed fraction.", 0.0, 10**6),
    },
    "validation": {
        "every_steps": Key("int", 200, "Steps between validations.", 1, 10**9),
        "patches": Key("int", 32, "Fixed held-out patches evaluated at each validation.", 1, 4096),
        "patience": Key("int", 10, "Validations without improvement before stopping early; 0 = never stop early.",
                        0, 10**6),
        "min_delta": Key("float", 0.0, "Smallest change that counts as an improvement (dB for PSNR, else loss).",
                         0.0, 1e6),
        "keep_final": Key("bool", True, "When the run completes its budget, `best.pt` is the final state (the "
                          "end of the learning-rate schedule), which is still validated and logged; false: it "
                          "competes with the earlier validations like any other."),
        "noise_margin": Key("float", 0.05, "After a start from trained weights: the relative error of the noise "
                            "variance the never-worse check allows for. MC-SURE moves with the noise level it is "
                            "given, in favour of the smoother state when the level is overestimated, so the "
                            "fine-tuned state is kept only if it is better for every variance within this "
                            "fraction of the one used. 0.05 covers the noise analysis's errors measured in the "
                            "benchmarks (+1.4% to +3.4% in variance); lower it for a calibrated `noise.toml`.",
                            0.0, 0.5),
    },
    "checkpoint": {
        "every_minutes": Key("float", 3.0, "Minutes between saves of `checkpoints/last.pt` (also saved at the end "
                             "and on SIGINT/SIGTERM).", 0.01, 10**6),
    },
    "logging": {
        "tensorboard": Key("bool", True, "Write TensorBoard event files to `tensorboard/` in the run folder."),
        "progress": Key("bool", True, "Show a progress bar."),
    },
    "mask": {
        "fraction": Key("float", 0.02, "`masked`: share of pixels masked and scored per patch.", 1e-4, 0.5),
        "grid": Key("bool", True, "`masked`: one masked pixel per grid cell at a random place (stratified), "
                    "instead of independent random pixels."),
        "replace": Key("choice", "neighbor", "`masked`: what replaces a masked pixel: a random pixel of its 5x5 "
                       "neighbourhood (`neighbor`), the mean of its 4 neighbours (`mean`), uniform noise (`noise`) "
                       "or zero (`zero`).", choices=("neighbor", "mean", "noise", "zero")),
    },
    "neighbor2neighbor": {
        "gamma": Key("float-or-auto", "auto", "Final weight of the consistency regulariser. `auto` = 2 from random "
                     "weights (Huang et al. 2021) and 1 for `neighbor2neighbor` fine-tuning trained weights (+0.04 to "
                     "+0.11 dB over 2 on gamma speckle at 10 minutes, 3 seeds; docs/benchmarks.md); "
                     "`neighbor2neighbor-stack` keeps 2 (its figures were measured at 2).", 0.0, 100.0),
        "frame_stride": Key("int", 2, "`neighbor2neighbor-stack`: its training windows take every n-th frame. 2 "
                            "gives the half-size training windows the motion the model meets between consecutive "
                            "full-size frames (sequences, anything that moves or shifts from slice to slice); 1 for "
                            "still stacks and volumes whose structure runs along the stack axis.", 1, 4),
        "stack_pairing": Key("choice", "auto", "`neighbor2neighbor-stack`: the input and target pixels of each "
                             "2x2 cell. `adjacent` = the published pairing (no input pixel at a target position in "
                             "any frame); `row-column-blind` = diagonal partners, no input pixel in a target's row or "
                             "column either (for banding repeated in every frame; smooths fine line structure); "
                             "`auto` = row-column-blind when the noise analysis flags banding and the row/column "
                             "correction is off (`data.fixed_pattern`), else adjacent.", choices=("auto", "adjacent", "row-column-blind")),
    },
    "recorrupted": {
        "alpha": Key("float-or-auto", "auto", "Recorruption strength: input y + alpha*z, target y - z/alpha. The "
                     "network learns to denoise noise sqrt(1 + alpha^2) times the real level, so a small alpha fits "
                     "the real noise better but gives noisier targets. `auto` = the scheme's measured best: 0.3 for "
                     "`recorrupted` (0.1 dB better than 0.5 in `grainwright bench train`), 1.0 for "
                     "`recorrupted-stack` (a K-frame model averages the input's extra noise down; +0.5 dB over 0.5 "
                     "and +1.2 dB over 0.3 at fixed steps on the generated sequence; docs/benchmarks.md).",
                     0.01, 10.0),
        "max_frame_correlation": Key("float", 0.4, "`recorrupted-stack`: the largest noise correlation between "
                                     "the frames of a window it trains on (measured per offset on the training "
                                     "stacks; the recorruption is drawn with the measured correlation, so what can "
                                     "leak the target's noise through the neighbours is the estimate's error). Above "
                                     "it the run stops (use `neighbor2neighbor-stack`); `auto` falls back to it. 0.4 "
                                     "lets the generated cast volume (0.3) train and stops a misfitted noise model, "
                                     "whose signal-dependent noise read 0.44 to 0.53 on a small generated sequence; "
                                     "raise it for noise known to be more correlated, its level given in a noise.toml "
                                     "(docs/stacks-and-volumes.md).", 0.0, 1.0),
    },
}


def defaults() -> dict[str, Any]:
    """The full config with every default."""
    def build(node: dict[str, Any]) -> dict[str, Any]:
        return {name: build(sub) if isinstance(sub, dict) else copy.deepcopy(sub.default) for name, sub in node.items()}
    return build(SCHEMA)


def _check_value(path: str, key: Key, value: Any) -> Any:
    kind = key.kind
    if kind == "bool-or-auto":
        if isinstance(value, bool) or value == "auto":
            return value
        raise ConfigError(f"{path}: expected true, false or \"auto\", got {value!r}")
    if kind == "float-or-auto":
        if value == "auto":
            return value
        if isinstance(value, str):
            raise ConfigError(f"{path}: expected a number or \"auto\", got {value!r}")
        kind = "float"
    if kind == "bool":
        if not isinstance(value, bool):
            raise ConfigError(f"{path}: expected true or false, got {value!r}")
        return value
    if kind == "table":
        if not isinstance(value, dict):
            raise ConfigError(f"{path}: expected a table, got {value!r}")
        return dict(value)
    if kind in ("str", "choice"):
        if not isinstance(value, str):
            raise ConfigError(f"{path}: expected a string, got {value!r}")
        if kind == "choice" and value not in key.choices:
            raise ConfigError(f"{path}: {value!r} is not one of {', '.join(key.choices)}"
                              f"{did_you_mean(value, key.choices)}")
        return value
    if kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{path}: expected an integer, got {value!r}")
    if kind == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{path}: expected a number, got {value!r}")
        value = float(value)
        if value != value:
            raise ConfigError(f"{path}: expected a number, got NaN")
    if (key.low is not None and value < key.low) or (key.high is not None and value > key.high):
        raise ConfigError(f"{path}: {value!r} is out of range [{key.low:g}, {key.high:g}]")
    return value


def validate(config: dict[str, Any]) -> dict[str, Any]:
    """Check ``config`` against ``SCHEMA`` and return it completed with defaults.

    Raises
    ------
    ConfigError
        On an unknown key (with the closest valid key), a wrong type or an out-of-range value; the message
        starts with the dotted key path.
    """
    def walk(node: dict[str, Any], schema: dict[str, Any], prefix: str) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for name, value in node.items():
            path = prefix + name
            if name not in schema:
                raise ConfigError(f"{path}: unknown key{did_you_mean(name, schema, prefix=prefix)}")
            entry = schema[name]
            if isinstance(entry, dict):
                if not isinstance(value, dict):
                    raise ConfigError(f"{path}: expected a table [{path}], got {value!r}")
                out[name] = walk(value, entry, path + ".")
            else:
                out[name] = _check_value(path, entry, value)
        return out

    checked = walk(config, SCHEMA, "")
    merged = defaults()
    for name, value in checked.items():
        if isinstance(value, dict) and isinstance(SCHEMA[name], dict):
            merged[name].update(value)
        else:
            merged[name] = value
    return merged


def parse_assignment(text: str) -> tuple[str, Any]:
    """Parse one ``--set key.path=value``; the value is read as TOML (``0.5``, ``true``, ``"adam"``), and a bare
    word that is not valid TOML is taken as a string."""
    if "=" not in text:
        raise ConfigError(f"--set {text}: expected key=value")
    path, raw = (part.strip() for part in text.split("=", 1))
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw
    return path, value


def apply_assignments(config: dict[str, Any], assignments: list[str]) -> dict[str, Any]:
    """Return a copy of ``config`` with each ``key.path=value`` of ``assignments`` set (not yet validated)."""
    out = copy.deepcopy(config)
    for text in assignments:
        path, value = parse_assignment(text)
        node = out
        parts = path.split(".")
        for part in parts[:-1]:
            node = node.setdefault(part, {})
            if not isinstance(node, dict):
                raise ConfigError(f"--set {text}: '{part}' is a value, not a table")
        node[parts[-1]] = value
    return out


def shipped_config(name: str) -> Path | None:
    """Path of a config shipped in ``grainwright.configs`` (``"fast-cpu"`` or ``"fast-cpu.toml"``), else None."""
    candidate = Path(str(resources.files("grainwright.configs"))) / f"{name.removesuffix('.toml')}.toml"
    return candidate if candidate.is_file() else None


def load_config(path: str | Path | None, assignments: list[str] = ()) -> dict[str, Any]:
    """Read a TOML config (or start from the defaults), apply ``--set`` assignments and validate."""
    raw: dict[str, Any] = {}
    if path is not None:
        path = given = Path(path)
        if not path.is_file():
            shipped = shipped_config(path.name)
            if path.parent != Path(".") or shipped is None:
                raise ConfigError(f"{path}: config file not found")
            path = shipped
        try:
            raw = tomllib.loads(path.read_text(encoding="utf-8"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
            raise ConfigError(f"{path}: not valid TOML ({error})") from None
        if "generated" in raw:  # the starting model's recipe: a config plus the generated-data table
            raise ConfigError(f"{given}: a starting-model recipe (it has a [generated] table), not a training config; "
                              f"train it with 'grainwright starting-model train --recipe {given} --out RUN_DIR'")
        _validated(raw, [], str(path))  # the file's own mistakes name the file
    return _validated(raw, list(assignments), "--set")


def _validated(raw: dict[str, Any], assignments: list[str], source: str) -> dict[str, Any]:
    """``raw`` with ``assignments`` applied, validated; a mistake is reported as coming from ``source`` (the
    config file, or ``--set`` for the values given on the command line)."""
    try:
        return validate(apply_assignments(raw, assignments))
    except ConfigError as error:
        text = str(error)
        raise ConfigError(text if text.startswith("--set") else f"{source}: {text}") from None


def schema_markdown() -> str:
    """The config reference as a Markdown table, rendered from ``SCHEMA`` (docs/configs.md embeds it verbatim)."""
    lines = ["| Key | Type | Default | Allowed | Meaning |", "|---|---|---|---|---|"]

    def show(value: Any) -> str:
        if isinstance(value, bool):
            return "true" if value else "false"
        if isinstance(value, str):
            return f'"{value}"'
        if isinstance(value, dict):
            return "{}"
        return f"{value:g}" if isinstance(value, float) else str(value)

    def walk(node: dict[str, Any], prefix: str) -> None:
        for name, entry in node.items():
            if isinstance(entry, dict):
                walk(entry, prefix + name + ".")
                continue
            if entry.choices:
                allowed = ", ".join(f"`{choice}`" for choice in entry.choices)
            elif entry.low is not None:
                allowed = ("`auto`, " if entry.kind == "float-or-auto" else "") + f"{entry.low:g} to {entry.high:g}"
            else:
                allowed = ""
            lines.append(f"| `{prefix}{name}` | {entry.kind} | `{show(entry.default)}` | {allowed} | {entry.doc} |")

    walk(SCHEMA, "")
    return "\n".join(lines) + "\n"
