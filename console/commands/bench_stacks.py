"""``grainwright bench stacks``: multi-frame models against single-frame ones and classical filters, and the
stack runtime's speed and memory; the measurement lives in :mod:`grainwright.benchmarks.stacks`."""
from __future__ import annotations

import argparse
import sys

from grainwright.console.torch_needed import require_torch

HELP = "stacks: K-frame vs single-frame speed, volume peak memory, sequence and volume quality vs classical filters"
PARTS = ("runtime", "sequence", "volume")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--parts", nargs="+", choices=PARTS, default=list(PARTS), help="what to measure (default: all)")
    parser.add_argument("--frames", type=int, default=5, metavar="K", help="frames per window (default 5)")
    parser.add_argument("--width", type=int, default=24, help="U-Net width of both models (default 24)")
    parser.add_argument("--minutes", type=float, default=10.0, help="training budget per model (default 10)")
    parser.add_argument("--steps", type=int, default=0,
                        help="training budget per model in optimiser steps instead of --minutes (fixed-step "
                        "comparisons on a shared machine; default 0 = use --minutes)")
    parser.add_argument("--sequence-schemes", choices=("recorrupted", "neighbor2neighbor"), default="recorrupted",
                        help="training schemes of the two sequence models: recorrupted-stack and recorrupted, or "
                        "neighbor2neighbor-stack and neighbor2neighbor (default recorrupted)")
    parser.add_argument("--sequence-alignment", choices=("optical-flow", "dominant-shifts"), default="dominant-shifts",
                        help="how the recorrupted K-frame model aligns its neighbours on the sequence "
                        "(model.align_neighbours; default dominant-shifts)")
    parser.add_argument("--sequence-size", type=int, nargs=2, default=[192, 256], metavar=("H", "W"),
                        help="frame size of the generated sequence (pixels, default 192 256)")
    parser.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                        help="a training config assignment for every trained model (repeatable), e.g. optim.lr=3e-3")
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2], help="one run per seed (default 0 1 2)")
    parser.add_argument("--threads", type=int, default=2, help="torch and ONNX Runtime threads (default 2)")
    parser.add_argument("--size", type=int, default=512, help="frame edge of the speed runs (pixels, default 512)")
    parser.add_argument("--runtime-frames", type=int, default=8, help="frames of the speed runs (default 8)")
    parser.add_argument("--repeat", type=int, default=3, help="interleaved speed repetitions, median (default 3)")
    parser.add_argument("--rss-slices", type=int, nargs="*", default=[200, 2000],
                        help="slices of the generated volumes of the peak-memory runs (default 200 2000; none to skip)")
    parser.add_argument("--rss-edge", type=int, default=64, help="slice edge of those volumes (pixels, default 64)")
    parser.add_argument("--bm3d-frames", type=int, default=6, help="sequence frames scored with BM3D (default 6)")
    parser.add_argument("--json", metavar="PATH", help="write all figures as JSON here")


def run(args: argparse.Namespace) -> int:
    require_torch("bench stacks")
    from grainwright.benchmarks.stacks import run_bench

    return run_bench(args, denoise_command=[sys.executable, "-m", "grainwright.console", "denoise"])
