"""``grainwright train``: fit a denoiser to the images in a data folder (needs PyTorch)."""
from __future__ import annotations

import argparse

from grainwright.console.torch_needed import require_torch

HELP = "train a denoiser from clean images, pairs, noisy pairs or single noisy images"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", nargs="?", metavar="CONFIG",
                        help="TOML config file, or the name of a shipped one (clean-synthetic, pairs, noisy-pairs, "
                        "noisy-only, fast-cpu); default: defaults for the layout found")
    parser.add_argument("--data", metavar="DIR", help="data folder (layouts: clean/, clean/ + noisy/, "
                        "noisy-a/ + noisy-b/, noisy-stacks/, noisy/ or images directly in DIR)")
    parser.add_argument("--scheme", metavar="NAME", help="supervised, noise2noise, masked, neighbor2neighbor, "
                        "recorrupted, sure or auto (overrides the config)")
    parser.add_argument("--set", dest="assignments", metavar="KEY=VALUE", action="append", default=[],
                        help="override one config key, e.g. --set optim.lr=5e-4 (repeatable)")
    budget = parser.add_mutually_exclusive_group()
    budget.add_argument("--minutes", type=float, metavar="N", help="wall-clock budget in minutes")
    budget.add_argument("--steps", type=int, metavar="N", help="budget in optimiser steps")
    parser.add_argument("--out", metavar="RUN_DIR", help="run folder to create (default runs/TIME-SCHEME)")
    parser.add_argument("--resume", metavar="RUN_DIR", help="continue a run exactly where it stopped")
    fit = parser.add_argument_group("sizing the model to a cycle time")
    fit.add_argument("--ms-per-frame", type=float, metavar="T", help="train the largest size of the ladder "
                     "predicted to denoise one --frame within T milliseconds (overrides the config's model)")
    fit.add_argument("--frame", metavar="WxH", help="with --ms-per-frame: frame size in pixels, e.g. 2048x1536")
    fit.add_argument("--fit-to", metavar="PROFILE.json", help="with --ms-per-frame: the target machine's profile "
                     "('grainwright bench runtime MODEL --profile-out PROFILE.json'); default: measure this machine")


def run(args: argparse.Namespace) -> int:
    require_torch("train")
    from grainwright.trainer.run import train_command

    assignments = list(args.assignments)
    if args.ms_per_frame is not None or args.frame or args.fit_to:
        from grainwright.inference.common.errors import ConfigError
        from grainwright.trainer.sizing import fit_assignments

        if args.ms_per_frame is None or not args.frame:
            raise ConfigError("sizing to a cycle time needs both --ms-per-frame T and --frame WxH")
        if args.resume:
            raise ConfigError("--ms-per-frame picks the size of a new run; a resumed run keeps its own")
        assignments += fit_assignments(args.fit_to, args.ms_per_frame, args.frame)
    summary, _ = train_command(args.config, args.data, scheme=args.scheme, assignments=assignments,
                               minutes=args.minutes, steps=args.steps, out=args.out, resume=args.resume)
    return 130 if summary["stopped"] == "interrupted" else 0
