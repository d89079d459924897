"""``grainwright bench models``: every architecture's size and speed, torch eager vs ONNX Runtime FP32 vs INT8."""
from __future__ import annotations

import argparse

from grainwright.console.torch_needed import require_torch

HELP = "architectures at their default size: parameters, MACs/px, receptive field, MP/s torch vs ORT FP32 vs INT8"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--architectures", nargs="+", metavar="NAME", help="registered names (default: all)")
    parser.add_argument("--size", type=int, default=1024, metavar="PIXELS", help="image edge (default 1024)")
    parser.add_argument("--channels", type=int, default=1, metavar="C", help="image channels (default 1)")
    parser.add_argument("--threads", type=int, default=2, metavar="N", help="threads for torch and ONNX Runtime")
    parser.add_argument("--repeats", type=int, default=3, metavar="N", help="timed rounds, best kept (default 3)")


def run(args: argparse.Namespace) -> int:
    require_torch("bench models")
    from grainwright.benchmarks.architectures import bench_models, format_table
    from grainwright.models.registry import architecture

    for name in args.architectures or []:
        architecture(name)  # unknown names fail before any timing
    rows = bench_models(args.architectures, size=args.size, channels=args.channels, threads=args.threads,
                        repeats=args.repeats)
    print(format_table(rows, args.size, args.threads))
    return 0
