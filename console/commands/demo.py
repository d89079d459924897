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
        help=f"training budget in minutes (default {DEFAULT_MINUTES:g}); the row from random weights gets the same "
        "number of steps, so training takes about twice this unless --skip-random-weights",
    )
    parser.add_argument(
        "--out", default=DEFAULT_OUT,
        help=f"folder for the scenario, models and report (default ./{DEFAULT_OUT}); must be new, empty, or a "
        "previous demo folder",
    )
    parser.add_argument("--seed", type=int, default=7, help="seed of the generated scenario and of training")
    parser.add_argument("--threads", type=int, default=0, help="threads for training and inference (0 = all cores)")
    parser.add_argument("--set", dest="assignments", metavar="KEY=VALUE", action="append", default=[],
                        help="override one training config key, e.g. --set model.precision=float32 (repeatable; "
                        "the keys of docs/configs.md)")
    parser.add_argument("--scored-frames-unseen", action="store_true",
                        help="train on the training frames only, so the held-out frames the report scores are frames "
                        "the model never saw (by default their noisy versions join the training frames, as the "
                        "frames a user means to denoise do; their clean versions never do)")
    parser.add_argument("--skip-random-weights", action="store_true",
                        help="leave out the record row trained for the same budget from random weights (halves "
                        "the training time)")


def run(args: argparse.Namespace) -> int:
    settings = DemoSettings(minutes=args.minutes, seed=args.seed, threads=args.threads,
                            train_settings=list(args.assignments), random_weights_row=not args.skip_random_weights,
                            train_on_scored=not args.scored_frames_unseen)
    run_demo(args.out, settings)
    return 0
