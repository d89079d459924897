"""Quality versus time per frame of the model sizes tried, with the chosen size marked (inline SVG, torch-free).

>>> svg = size_plot_svg([("residual 8x32", 120.0, 30.1), ("residual 10x48", 310.0, 30.4)], chosen="residual 8x32",
...                     target_ms=200.0)
>>> svg.startswith("<svg") and "chosen" in svg
True

The points usually come from the recorded quality search (``grainwright bench sizes --sweep``, its JSON) with the
time per frame predicted for a machine profile (:func:`points_from_sweep`); the compare report can embed the SVG.
"""
from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

from grainwright.inference.common.atomic import write_text_atomic
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.evaluation.svgplot import log_scatter_svg
from grainwright.inference.runtime.machine_profile import (
    load_profile,
    seconds_per_gmac_for,
)
from grainwright.inference.runtime.tiling import default_tile, plan_tiles, tile_margin


def size_plot_svg(points: list[tuple[str, float, float]], chosen: str | None = None, target_ms: float | None = None,
                  quality_label: str = "PSNR (dB)", standalone: bool = True) -> str:
    """An SVG scatter of ``(label, milliseconds per frame, quality)``: time on a log axis, the ``chosen`` label
    ringed and named, the ``target_ms`` drawn as a dashed vertical line. Non-finite or non-positive times are
    left out. ``standalone`` adds the SVG namespace for a file of its own."""
    return log_scatter_svg(points, "milliseconds per frame (log scale; faster to the left)", quality_label,
                           aria_label="quality versus time per frame of the model sizes tried", chosen=chosen,
                           marker=target_ms, marker_label=f"target {target_ms:g} ms" if target_ms else "",
                           standalone=standalone, width=600, height=340)


def predicted_ms(macs_per_pixel: float, width: int, receptive_field: int, alignment: int,
                 profile: dict[str, Any], frame: tuple[int, int], ensemble: int = 1) -> float:
    """Milliseconds per ``frame = (width, height)`` frame on ``profile``'s machine: the network on the pixels
    the runtime's default tiles compute, plus the runtime's own per-frame and per-megapixel cost (the model of
    ``grainwright.trainer.sizing``, torch-free)."""
    columns, rows = frame
    margin = tile_margin(receptive_field, alignment)
    plan = plan_tiles(rows, columns, tile=default_tile(margin, alignment), margin=margin, alignment=alignment)
    network = macs_per_pixel * plan.computed_pixels / 1e9 * seconds_per_gmac_for(profile, width) * ensemble
    overhead = profile.get("runtime_overhead", {})
    runtime = overhead.get("seconds_per_frame", 0.0) + overhead.get("seconds_per_megapixel", 0.0) * rows * columns / 1e6
    return 1000.0 * (network + runtime)


def points_from_sweep(results: dict[str, Any], profile: dict[str, Any], frame: tuple[int, int],
                      case: str = "gaussian") -> list[tuple[str, float, float]]:
    """``(trial, predicted ms per frame, mean PSNR without ensemble)`` for each trial of ``case`` in a search's
    JSON results, with the receptive field and alignment read from each trial's exported model when present."""
    from grainwright.inference.runtime.modelinfo import read_model_metadata

    points = []
    for name, record in results["trials"].items():
        if record["spec"]["case"] != case:
            continue
        hyper = record["spec"]["hyper"]
        receptive, alignment = 2 * hyper.get("depth", 10) + 1, 1
        if record.get("onnx") and Path(record["onnx"]).is_file():
            metadata = read_model_metadata(record["onnx"])
            architecture = metadata.get("architecture") if isinstance(metadata.get("architecture"), dict) else {}
            receptive = int(metadata.get("receptive_field", architecture.get("receptive_field", receptive)))
            alignment = int(metadata.get("alignment", architecture.get("alignment", alignment)))
        ms = predicted_ms(record["macs_per_pixel"], hyper.get("width", 32), receptive, alignment, profile, frame)
        points.append((name, ms, record["mean"]["1"]))
    return points


def size_search_svg(results_path: str | Path, profile_path: str | Path, frame: str = "1024x1024",
                    target_ms: float | None = None, case: str = "gaussian") -> str:
    """The quality-versus-time plot of a recorded size search (``grainwright bench sizes --sweep``, its JSON) for
    the machine in ``profile_path`` and frames of ``frame`` (``"WxH"``, pixels). The chosen size, ringed, is the
    best mean PSNR among the sizes predicted to stay under ``target_ms`` (all sizes when it is None)."""
    match = re.fullmatch(r"\s*(\d+)\s*[xX]\s*(\d+)\s*", str(frame))
    if not match or min(int(match.group(1)), int(match.group(2))) < 1:
        raise ConfigError(f"frame size must look like 1024x768 (width x height in pixels), got {frame!r}")
    try:
        results = json.loads(Path(results_path).read_text(encoding="utf-8"))
        trials = results["trials"]
    except (OSError, ValueError, KeyError, TypeError) as error:
        raise InputError(results_path, f"not a size-search results file ({error})") from None
    if not isinstance(trials, dict):
        raise InputError(results_path, "not a size-search results file (no trials)")
    points = points_from_sweep(results, load_profile(profile_path), (int(match.group(1)), int(match.group(2))), case)
    if not points:
        raise InputError(results_path, f"no '{case}' trials recorded")
    fitting = [point for point in points if target_ms is None or point[1] <= target_ms]
    chosen = max(fitting, key=lambda point: point[2])[0] if fitting else None
    return size_plot_svg(points, chosen=chosen, target_ms=target_ms)


def write_size_plot(path: str | Path, svg: str) -> Path:
    """Write the SVG atomically (temporary name in the same folder, then rename)."""
    return write_text_atomic(path, svg)
