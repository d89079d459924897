"""``grainwright bench baselines``: PSNR and seconds per megapixel of every classical baseline, in one run; the
measurement lives in :mod:`grainwright.benchmarks.baselines`."""
from __future__ import annotations

import argparse

from grainwright.benchmarks.baselines import SAMPLE_IMAGES, run_bench

HELP = "baselines: PSNR (defaults and tuned on ground truth) and seconds per megapixel of each classical filter"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--images", default="camera,astronaut,coins,moon",
                        help=f"scikit-image sample images, commas (from {', '.join(SAMPLE_IMAGES)}; astronaut is "
                             "colour, the others grayscale)")
    parser.add_argument("--size", type=int, default=256, help="edge of the centre crop of each image (pixels)")
    parser.add_argument("--sigma", type=float, default=25.0, help="Gaussian noise sigma in 8-bit units")
    parser.add_argument("--methods", default="all", help="baseline names, commas, or 'all'")
    parser.add_argument("--quick", action="store_true",
                        help="two 128-pixel crops and the smaller calibration grids instead of the search grids")
    parser.add_argument("--seed", type=int, default=0, help="seed of the added noise")
    parser.add_argument("--json", metavar="PATH", help="write all figures as JSON here")


def run(args: argparse.Namespace) -> int:
    return run_bench(args)
