"""``grainwright demo``: the whole job on a generated plant scenario, from inspection to the compare report."""
from __future__ import annotations

import argparse

from grainwright.console.demo import (
    DEFAULT_MINUTES,
    DEFAULT_OUT,
    DemoSettings,
    run_demo,
)

HELP = "run the whole job on a generated inspection-camera scenario: inspect, train, export, denoise, compare"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--minutes", type=float, default=DEFAULT_MINUTES,
        help=f"training budget in minutes (default {DEFAULT_MINUTES:g}; the whole demo takes a few minutes more)",
    )
    parser.add_argument(
        "--out", default=DEFAULT_OUT,
        help=f"folder for the scenario, model and report (default ./{DEFAULT_OUT}); must be new, empty, or a "
        "previous demo folder",
    )
    parser.add_argument("--seed", type=int, default=7, help="seed of the generated scenario and of training")
    parser.add_argument("--threads", type=int, default=0, help="threads for training and inference (0 = all cores)")


def run(args: argparse.Namespace) -> int:
    settings = DemoSettings(minutes=args.minutes, seed=args.seed, threads=args.threads)
    run_demo(args.out, settings)
    return 0
