"""``grainwright bench cluster MODEL.onnx``: the same batch on the local path and on local Dask clusters (1 worker
x all cores against one worker per core), cluster start-up apart, and the per-task overhead; the measurement lives
in :mod:`grainwright.benchmarks.cluster`. Needs the ``cluster`` extra."""
from __future__ import annotations

import argparse

HELP = "cluster: local denoise vs Dask clusters of 1 worker x N threads and N workers x 1 thread; per-task overhead"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", help="an exported .onnx model")
    parser.add_argument("--frames", type=int, default=40, help="frames in the batch (default 40)")
    parser.add_argument("--size", type=int, default=1024, help="edge of each square frame (pixels, default 1024)")
    parser.add_argument("--cores", type=int, help="cores to use (default: all)")
    parser.add_argument("--repeat", type=int, default=1, help="interleaved rounds, median reported (default 1)")
    parser.add_argument("--overhead-files", type=int, default=100,
                        help="tiny frames for the per-task overhead measurement (default 100)")
    parser.add_argument("--json", metavar="PATH", help="write all figures as JSON here")


def run(args: argparse.Namespace) -> int:
    from grainwright.benchmarks.cluster import run_bench

    return run_bench(args)
