"""``grainwright bench starting-model``: the shipped starting model alone (no training on the scored images) vs
classical filters tuned on ground truth at several Gaussian noise levels, and its ``denoise`` speed vs the default
``noisy-only`` model (needs PyTorch for the export)."""
from __future__ import annotations

import argparse

from grainwright.console.torch_needed import require_torch

HELP = "the starting model with no training vs filters tuned on ground truth; its speed vs the default model"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--sigmas", default="10,25,50", metavar="LIST",
                        help="Gaussian noise levels in 1/255 of the range (default 10,25,50)")
    parser.add_argument("--checkpoint", metavar="FILE", help="score this starting checkpoint instead of the shipped "
                        "one (e.g. a recipe run's checkpoints/last.pt)")
    parser.add_argument("--repeats", type=int, default=3, metavar="N",
                        help="timed denoise runs per model on the 2048x2048 frame (0 = skip the speed part)")
    parser.add_argument("--threads", type=int, default=1, metavar="N", help="ONNX Runtime threads (default 1)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the noise (bench train's default 0)")
    parser.add_argument("--bm3d-published", action="store_true", help="BM3D at its published threshold (2.7 sigma) "
                        "in the opponent instead of its ground-truth grid (six times cheaper, a weaker opponent)")
    parser.add_argument("--json", metavar="FILE", help="also write the results as JSON; a rerun with the same "
                        "file reuses the opponent's tuning")


def run(args: argparse.Namespace) -> int:
    require_torch("bench starting-model")
    from grainwright.benchmarks.starting_model import run_bench

    return run_bench(args)
