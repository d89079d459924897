"""Sizing a model to a cycle time: the size ladder, the time predictor and the picker.

The ladder is an ordered list of architecture configurations from the registry, smallest to largest in
multiply-accumulates per pixel (``residual`` stacks: deeper and wider). The predicted time per frame of a rung on
a machine is

    network  = MACs per pixel x pixels the tiles compute x seconds per GMAC (profile, at the rung's width) / 10^9
    runtime  = seconds per frame + seconds per megapixel x frame megapixels (the runtime beyond the network)
    per frame = network x ensemble members + runtime

where "pixels the tiles compute" follows the runtime's own tile plan at its default tile size, so the overlap
of the tiles is counted exactly. The profile comes from :mod:`grainwright.inference.runtime.machine_profile`
(``grainwright bench runtime MODEL --profile-out PROFILE.json`` on the target machine). The picker returns the
largest rung whose prediction stays within the target; ``grainwright bench sizes --check-prediction`` compares
predictions with measured ``denoise`` times.
"""
from __future__ import annotations

import re
import time
from dataclasses import dataclass, field
from typing import Any, Callable

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.runtime.machine_profile import seconds_per_gmac_for
from grainwright.inference.runtime.tiling import default_tile, plan_tiles, tile_margin


@dataclass(frozen=True)
class Rung:
    """One architecture configuration of the ladder, with its size figures (from the registry's model)."""

    architecture: str
    hyper: dict[str, Any] = field(hash=False)
    macs_per_pixel: float = 0.0
    receptive_field: int = 1
    alignment: int = 1
    width: int = 1

    @property
    def label(self) -> str:
        return f"{self.architecture} {self.hyper['depth']}x{self.hyper['width']}"

    def assignments(self) -> list[str]:
        """``--set`` assignments that make a training config build this rung."""
        table = ", ".join(f"{key} = {value}" for key, value in self.hyper.items())
        return [f'model.name="{self.architecture}"', f"model.hyper={{{table}}}"]


# (depth, width) of the residual rungs, in increasing MACs per pixel. 10x48 is the shipped default size.
LADDER_SIZES = ((5, 16), (6, 24), (8, 32), (10, 32), (10, 48), (12, 48), (15, 64), (20, 64))


def rung(architecture: str, channels: int = 1, **hyper: Any) -> Rung:
    """Build the registry's model once to read its MACs per pixel, receptive field and alignment."""
    from grainwright.models.registry import build_model

    model = build_model(architecture, channels, **hyper)
    return Rung(architecture, dict(hyper), float(model.macs_per_pixel()), int(model.receptive_field),
                int(model.alignment), int(hyper.get("width", 1)))


def ladder(channels: int = 1) -> list[Rung]:
    """The size ladder for ``channels`` image channels, smallest first."""
    rungs = [rung("residual", channels, depth=depth, width=width) for depth, width in LADDER_SIZES]
    return sorted(rungs, key=lambda item: item.macs_per_pixel)


def parse_frame(text: str) -> tuple[int, int]:
    """``"WxH"`` (e.g. ``"2048x1536"``, pixels) -> ``(width, height)``; ConfigError otherwise."""
    match = re.fullmatch(r"\s*(\d+)\s*[xX]\s*(\d+)\s*", str(text))
    if not match or int(match.group(1)) < 1 or int(match.group(2)) < 1:
        raise ConfigError(f"--frame: expected WIDTHxHEIGHT in pixels, e.g. 2048x1536, got {text!r}")
    return int(match.group(1)), int(match.group(2))


@dataclass(frozen=True)
class Prediction:
    """Predicted seconds per frame of one rung, and its parts."""

    rung: Rung
    seconds: float
    network_seconds: float
    runtime_seconds: float
    computed_pixels: int

    @property
    def milliseconds(self) -> float:
        return 1000.0 * self.seconds


def predict(item: Rung, profile: dict[str, Any], frame: tuple[int, int], *, precision: str = "fp32",
            ensemble: int = 1, tile: int | None = None) -> Prediction:
    """Predicted time of ``denoise`` for one ``frame = (width, height)`` frame with rung ``item`` on the machine
    described by ``profile`` (seconds; see the module docstring)."""
    width, height = frame
    margin = tile_margin(item.receptive_field, item.alignment)
    plan = plan_tiles(height, width, tile=tile or default_tile(margin, item.alignment), margin=margin,
                      alignment=item.alignment)
    gmacs = item.macs_per_pixel * plan.computed_pixels / 1e9
    network = gmacs * seconds_per_gmac_for(profile, item.width, precision) * ensemble
    overhead = profile.get("runtime_overhead", {})
    runtime = float(overhead.get("seconds_per_frame", 0.0)) \
        + float(overhead.get("seconds_per_megapixel", 0.0)) * width * height / 1e6
    return Prediction(item, network + runtime, network, runtime, plan.computed_pixels)


def pick(profile: dict[str, Any], ms_per_frame: float, frame: tuple[int, int], *, precision: str = "fp32",
         ensemble: int = 1, rungs: list[Rung] | None = None) -> tuple[Prediction, list[Prediction]]:
    """The largest rung predicted to denoise one frame within ``ms_per_frame`` milliseconds.

    Returns the chosen prediction and the predictions of every rung. Raises ``ConfigError`` when even the
    smallest rung is predicted slower than the target (saying how slow), or the target is not positive.
    """
    if not ms_per_frame > 0:
        raise ConfigError(f"--ms-per-frame must be a positive number of milliseconds, got {ms_per_frame!r}")
    rungs = ladder() if rungs is None else rungs
    predictions = [predict(item, profile, frame, precision=precision, ensemble=ensemble) for item in rungs]
    fitting = [prediction for prediction in predictions if prediction.milliseconds <= ms_per_frame]
    if not fitting:
        smallest = min(predictions, key=lambda p: p.milliseconds)
        raise ConfigError(f"--ms-per-frame {ms_per_frame:g}: even the smallest size, {smallest.rung.label}, is "
                          f"predicted at {smallest.milliseconds:.0f} ms per {frame[0]}x{frame[1]} frame on this "
                          f"machine profile; allow at least {smallest.milliseconds:.0f} ms, use smaller frames, or "
                          "a faster machine")
    return fitting[-1], predictions


def fit_assignments(profile_path: str | None, ms_per_frame: float, frame_text: str, *, threads: int | None = None,
                    announce: Callable[[str], None] = print) -> list[str]:
    """For ``grainwright train --fit-to``: pick the rung, say which and its predicted time, and return the
    ``--set`` assignments that train it. Without a profile file, this machine's is measured first."""
    from grainwright.inference.runtime.machine_profile import (
        load_profile,
        measure_profile,
    )

    frame = parse_frame(frame_text)
    if profile_path:
        profile, source = load_profile(profile_path), str(profile_path)
    else:
        announce("no --fit-to profile given: measuring this machine's (about a minute)")
        profile, source = measure_profile(threads=threads or 2, log=announce), "this machine"
    chosen, predictions = pick(profile, ms_per_frame, frame)
    for prediction in predictions:
        mark = "<- picked" if prediction is chosen else ""
        announce(f"  {prediction.rung.label:16s} {prediction.rung.macs_per_pixel:9.0f} MACs/px  predicted "
                 f"{prediction.milliseconds:9.0f} ms per frame {mark}")
    announce(f"fit to {ms_per_frame:g} ms per {frame[0]}x{frame[1]} frame on {source} "
             f"({profile['threads']} threads): picked {chosen.rung.label}, predicted {chosen.milliseconds:.0f} ms "
             f"per frame (network {1000 * chosen.network_seconds:.0f} ms, "
             f"runtime {1000 * chosen.runtime_seconds:.0f} ms); the ladder's sizes have no starting model, so "
             "the fitted size trains from random weights (start.weights = \"random\")")
    return chosen.rung.assignments() + ['start.weights="random"']


# -- checking the predictions ---------------------------------------------------------------------------------

# Rungs (ladder indices) whose predicted times set the default targets of the check: small, middle, large.
CHECK_RUNGS = (1, 3, 5)


def default_targets(profile: dict[str, Any], frame: tuple[int, int], rungs: list[Rung]) -> list[float]:
    """Targets (ms) half-way (geometric mean) between the predictions of ``CHECK_RUNGS`` and the next rung up, so
    each picks a different rung and small prediction errors do not change the pick."""
    times = [predict(item, profile, frame).milliseconds for item in rungs]
    return [round((times[i] * times[i + 1]) ** 0.5) for i in CHECK_RUNGS if i + 1 < len(times)]


def check_prediction(frame: tuple[int, int], targets_ms: list[float], *, threads: int, repeats: int = 3,
                     profile: dict[str, Any] | None = None, log: Callable[[str], None] = print) -> list[dict[str, Any]]:
    """For each target: pick the rung, export it (random weights: only the time matters) with a 16-bit
    normalisation, and time the file-to-file ``denoise`` path on a generated 16-bit TIFF frame of ``frame``
    pixels.

    Without a ``profile``, each of the ``repeats`` rounds first measures a fresh FP32 profile of this machine,
    and re-measures the seconds per GMAC at the rung's width right before each timed ``denoise``, so that the
    prediction and the measurement it is compared with see the same load on a shared machine; the rungs are
    picked with the first round's profile. The figures are the medians over the rounds, and the error is the
    median of the rounds' ``predicted / measured - 1``. Returns one row per target.
    """
    import tempfile
    from pathlib import Path

    import numpy as np
    import onnx
    import torch

    from grainwright.inference.images.imageio import write_image
    from grainwright.inference.images.normalization import Normalization
    from grainwright.inference.runtime.batch import denoise_files
    from grainwright.inference.runtime.machine_profile import (
        REFERENCE_DEPTH,
        measure_profile,
        seconds_per_gmac,
    )
    from grainwright.inference.runtime.runner import ModelSpec, OnnxDenoiser
    from grainwright.models.export import export_graph
    from grainwright.models.registry import build_model

    def round_profile() -> dict[str, Any]:
        if profile is not None:
            return profile
        return measure_profile(threads=threads, repeats=1, precisions=("fp32",), log=lambda text: None)

    width, height = frame
    rng = np.random.default_rng(0)
    image = np.clip(rng.normal(20000, 800, (height, width, 1)), 0, 65535).astype(np.uint16)
    normalization = Normalization.for_array(image, 16)
    first = round_profile()
    rows, runs = [], []
    with tempfile.TemporaryDirectory(prefix="grainwright-sizes-") as temp:
        folder = Path(temp)
        source = write_image(folder / "in" / "frame.tif", image)
        for target in targets_ms:
            item = pick(first, target, frame)[0].rung
            torch.manual_seed(0)
            model = build_model(item.architecture, 1, **item.hyper)
            path = folder / f"{item.label.replace(' ', '-')}.onnx"
            onnx.save(export_graph(model, normalization), str(path))
            denoiser = OnnxDenoiser(path, threads=threads, spec=ModelSpec(receptive_field=item.receptive_field,
                                                                      alignment=item.alignment))
            denoiser.run(image[:64, :64])  # warm-up
            rows.append({"target_ms": target, "rung": item.label, "macs_per_pixel": item.macs_per_pixel,
                         "predicted": [], "measured": []})
            runs.append((item, denoiser))
        for round_index in range(repeats):
            current = first if round_index == 0 else round_profile()
            for row, (item, denoiser) in zip(rows, runs):
                if profile is None:  # the network's speed just now, at this rung's width
                    speed = seconds_per_gmac(REFERENCE_DEPTH, item.width, "fp32", threads, repeats=1)
                    current = {**current, "seconds_per_gmac": {"fp32": {str(item.width): speed}}}
                start = time.perf_counter()
                [result] = denoise_files(denoiser, [source], folder / "out", overwrite=True)
                row["measured"].append(1000.0 * (time.perf_counter() - start))
                row["predicted"].append(predict(item, current, frame).milliseconds)
                if result.status != "done":
                    raise ConfigError(f"benchmark denoise failed: {result.message}")
    for row in rows:
        row["predicted_ms"] = float(np.median(row["predicted"]))
        row["measured_ms"] = float(np.median(row["measured"]))
        row["error"] = float(np.median([p / m - 1.0 for p, m in zip(row["predicted"], row["measured"])]))
        log(f"  target {row['target_ms']:8.0f} ms: {row['rung']:16s} predicted {row['predicted_ms']:8.0f} ms, "
            f"measured {row['measured_ms']:8.0f} ms (median error {row['error']:+.1%}; rounds "
            + ", ".join(f"{p / m - 1:+.0%}" for p, m in zip(row["predicted"], row["measured"])) + ")")
    return rows
