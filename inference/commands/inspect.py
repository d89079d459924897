"""``grainwright inspect PATH...``: describe images and their noise, and recommend how to train."""
from __future__ import annotations

import argparse
import json
import sys

import numpy as np

from grainwright.inference.errors import GrainwrightError
from grainwright.inference.estimation import estimate_sigma
from grainwright.inference.imageio import find_images, read_frames
from grainwright.inference.normalization import Normalization

HELP = "describe images and their noise (level, model, flags) and recommend a training scheme"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("paths", nargs="+", metavar="PATH", help="image files, folders or glob patterns")
    parser.add_argument("--recursive", action="store_true", help="descend into sub-folders")
    parser.add_argument("--bit-depth", type=int, default=None, help="effective bit depth of integer data")
    parser.add_argument("--json", action="store_true", help="print one JSON document instead of text")


def run(args: argparse.Namespace) -> int:
    paths = find_images(args.paths, recursive=args.recursive)
    images, failures = [], []
    for path in paths:
        try:
            frames = read_frames(path)
        except GrainwrightError as error:
            failures.append({"path": str(path), "error": str(error)})
            print(f"grainwright inspect: error: {error}", file=sys.stderr)
            continue
        norm = Normalization.for_array(frames, bit_depth=args.bit_depth)
        sigma = estimate_sigma(frames[0])
        images.append(
            {
                "path": str(path),
                "frames": int(frames.shape[0]),
                "shape": list(frames.shape[1:]),
                "dtype": frames.dtype.name,
                "bit_depth": norm.bit_depth,
                "min": float(frames.min()),
                "max": float(frames.max()),
                "sigma_native": [float(s) for s in sigma],
                "sigma_percent_of_range": [float(100 * s / norm.full_range) for s in sigma],
            }
        )
    report = {"images": images, "failures": failures}
    if args.json:
        print(json.dumps(report, indent=1))
    else:
        for item in images:
            print(
                f"{item['path']}: {item['shape']} {item['dtype']} ({item['bit_depth']} bit), range "
                f"{item['min']:g}..{item['max']:g}, sigma {', '.join(f'{s:.3g}' for s in item['sigma_native'])}"
            )
    return 1 if failures or not images else 0
