"""``grainwright bench TARGET``: side-by-side speed and quality measurements, reported as ratios."""
from __future__ import annotations

import argparse
import importlib

HELP = "measure speed and quality side by side (models, train, runtime, baselines, sizes, starting-model, stacks)"

# Each target module is torch-free at import time and exposes HELP, add_arguments(parser) and run(args).
BENCH_TARGETS: dict[str, str] = {
    "models": "grainwright.console.commands.bench_models",
    "train": "grainwright.console.commands.bench_train",
    "runtime": "grainwright.console.commands.bench_runtime",
    "baselines": "grainwright.console.commands.bench_baselines",
    "sizes": "grainwright.console.commands.bench_sizes",
    "watch": "grainwright.console.commands.bench_watch",
    "starting-model": "grainwright.console.commands.bench_starting",
    "stacks": "grainwright.console.commands.bench_stacks",
    "cluster": "grainwright.console.commands.bench_cluster",
}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    targets = parser.add_subparsers(dest="bench_target", metavar="TARGET", required=True)
    for name, module_name in BENCH_TARGETS.items():
        module = importlib.import_module(module_name)
        sub = targets.add_parser(name, help=module.HELP, description=module.HELP)
        module.add_arguments(sub)
        sub.set_defaults(bench_run=module.run)


def run(args: argparse.Namespace) -> int:
    return int(args.bench_run(args) or 0)
