"""``grainwright train``: fit a denoiser to the images in a data folder (needs PyTorch)."""
from __future__ import annotations

import argparse

from grainwright.inference.torch_needed import require_torch

HELP = "train a denoiser from clean images, pairs, noisy pairs or single noisy images"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", nargs="?", metavar="CONFIG",
                        help="TOML config file, or the name of a shipped one (clean-synthetic, pairs, noisy-pairs, "
                        "noisy-only, fast-cpu); default: defaults for the layout found")
    parser.add_argument("--data", metavar="DIR", help="data folder (layouts: clean/, clean/ + noisy/, "
                        "noisy-a/ + noisy-b/, noisy-stacks/, noisy/ or images directly in DIR)")
    parser.add_argument("--scheme", metavar="NAME", help="supervised, noise2noise, masked, neighbor2neighbor, "
                        "recorrupted or auto (overrides the config)")
    parser.add_argument("--set", dest="assignments", metavar="KEY=VALUE", action="append", default=[],
                        help="override one config key, e.g. --set optim.lr=5e-4 (repeatable)")
    budget = parser.add_mutually_exclusive_group()
    budget.add_argument("--minutes", type=float, metavar="N", help="wall-clock budget in minutes")
    budget.add_argument("--steps", type=int, metavar="N", help="budget in optimiser steps")
    parser.add_argument("--out", metavar="RUN_DIR", help="run folder to create (default runs/TIME-SCHEME)")
    parser.add_argument("--resume", metavar="RUN_DIR", help="continue a run exactly where it stopped")


def run(args: argparse.Namespace) -> int:
    require_torch("train")
    from grainwright.trainer.run import train_command

    summary, _ = train_command(args.config, args.data, scheme=args.scheme, assignments=args.assignments,
                               minutes=args.minutes, steps=args.steps, out=args.out, resume=args.resume)
    return 130 if summary["stopped"] == "interrupted" else 0
