"""``grainwright bench runtime MODEL.onnx``: the runtime's speed and memory, measured side by side in one run
(bare ONNX Runtime call against the file-to-file path, tile sizes, FP32 against INT8, 1-MP frame time, peak
memory); the measurement lives in :mod:`grainwright.benchmarks.runtime`."""
from __future__ import annotations

import argparse
import sys

HELP = "runtime: bare ONNX Runtime vs file-to-file denoise, tile sizes, FP32 vs INT8, 1-MP frame time, peak memory"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", help="an exported .onnx model")
    parser.add_argument("--int8", metavar="PATH", help="INT8 model to compare (default: NAME.int8.onnx if present)")
    parser.add_argument("--threads", type=int, default=2, help="ONNX Runtime threads for the throughput runs")
    parser.add_argument("--size", type=int, default=2048, help="edge of the square test image (pixels)")
    parser.add_argument("--repeat", type=int, default=2, help="interleaved repetitions (median reported)")
    parser.add_argument("--tiles", default="128,256,384,512", help="kept-tile edges to sweep (pixels, commas)")
    parser.add_argument("--rss-megapixels", default="16,256",
                        help="sizes of the generated TIFFs for the peak-memory runs (megapixels, commas; "
                        "'none' to skip)")
    parser.add_argument("--rss-model", metavar="PATH", help="model for the peak-memory runs (default: MODEL)")
    parser.add_argument("--profile", "--profile-out", dest="profile", metavar="PATH",
                        help="also measure this machine's sizing profile (reference conv stacks) and write it here")
    parser.add_argument("--json", metavar="PATH", help="write all figures as JSON here")


def run(args: argparse.Namespace) -> int:
    from grainwright.benchmarks.runtime import run_bench

    return run_bench(args, denoise_command=[sys.executable, "-m", "grainwright.console", "denoise"])
