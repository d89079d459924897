"""``grainwright bench watch MODEL.onnx``: the line service's capacity against the bare ONNX Runtime loop, then
fixed-rate arrivals (latency percentiles, queue, lost and duplicated frames) and an optional soak.

The measurement is :mod:`grainwright.benchmarks.line_service`; this module only reads the options.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from grainwright.inference.common.atomic import write_json_atomic
from grainwright.inference.common.errors import ConfigError

HELP = "watch: line-service capacity vs bare ONNX Runtime, latency under fixed-rate arrivals, soak"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", help="an exported .onnx model")
    parser.add_argument("--frames", type=int, default=100, metavar="N", help="backlog for the capacity (default 100)")
    parser.add_argument("--size", type=int, default=512, metavar="PIXELS", help="edge of the square 16-bit frames")
    parser.add_argument("--threads", type=int, default=2, metavar="N", help="ONNX Runtime threads (default 2)")
    parser.add_argument("--repeat", type=int, default=1, metavar="N",
                        help="interleaved capacity rounds, median reported (default 1)")
    parser.add_argument("--loads", default="0.5,0.9", metavar="LIST",
                        help="fixed arrival rates as fractions of the measured capacity (default 0.5,0.9)")
    parser.add_argument("--seconds", type=float, default=60.0, metavar="S", help="length of each fixed-rate run")
    parser.add_argument("--soak-minutes", type=float, default=0.0, metavar="M",
                        help="also run a soak this long (30 for the recorded one; default 0: none)")
    parser.add_argument("--soak-load", type=float, default=0.5, metavar="F", help="soak rate, fraction of capacity")
    parser.add_argument("--fixed-pattern", choices=("never", "auto"), default="never",
                        help="the service's banding correction: never (default: the service's own work against the "
                        "bare loop) or auto (adds the per-frame banding detection)")
    parser.add_argument("--json", metavar="PATH", help="write all figures as JSON here")


def run(args: argparse.Namespace) -> int:
    from grainwright.benchmarks.line_service import run_bench

    try:
        loads = tuple(float(value) for value in args.loads.split(",") if value.strip())
    except ValueError:
        raise ConfigError(f"--loads must be fractions separated by commas, got {args.loads!r}") from None
    if args.frames < 1 or args.size < 8 or args.threads < 1 or args.repeat < 1 or args.seconds <= 0 \
            or not all(0 < load < 2 for load in (*loads, args.soak_load)):
        raise ConfigError("--frames, --threads and --repeat must be >= 1, --size >= 8, --seconds > 0, and each "
                          "load (and --soak-load) between 0 and 2")
    launcher = [sys.executable, "-m", "grainwright.console", "watch"]
    figures = run_bench(Path(args.model), launcher, frames=args.frames, size=args.size, threads=args.threads,
                        repeat=args.repeat, loads=loads, seconds=args.seconds, soak_minutes=args.soak_minutes,
                        soak_load=args.soak_load, fixed_pattern=args.fixed_pattern)
    if args.json:
        write_json_atomic(args.json, figures)
    runs = figures["load"] + ([figures["soak"]] if "soak" in figures else [])
    faults = sum(run["lost"] + run["duplicated"] for run in runs)
    return 0 if faults == 0 and all(run["drained"] for run in runs) else 1
