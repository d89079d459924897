"""``grainwright inspect PATH...``: describe images and their noise, and recommend how to train."""
from __future__ import annotations

import argparse
import json
import sys

from grainwright.inference.common.atomic import remove_stale_temporaries
from grainwright.inference.common.errors import InputError
from grainwright.inference.noise.analysis import format_text, inspect_paths
from grainwright.inference.noise.models import save_noise

HELP = "describe images and their noise (level, model, flags) and recommend a training scheme"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "paths", nargs="+", metavar="PATH",
        help="image files, folders or glob patterns; a folder with the training layout's sub-folders "
        "(clean/ + noisy/, noisy-a/ + noisy-b/, noisy-stacks/, clean/, noisy/) is read as that layout",
    )
    parser.add_argument("--recursive", action="store_true", help="descend into sub-folders")
    parser.add_argument("--bit-depth", type=int, default=None, metavar="BITS",
                        help="effective bit depth of integer data (default: detected from the maximum value)")
    parser.add_argument("--replace-nonfinite", action="store_true",
                        help="replace NaN/Inf pixels by the image median instead of refusing the file")
    parser.add_argument("--json", action="store_true", help="print one JSON document instead of text")
    parser.add_argument("--save-noise", metavar="FILE.toml", default=None,
                        help="write the noise model of the set as a noise description for the trainer")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing --save-noise file")


def run(args: argparse.Namespace) -> int:
    report = inspect_paths(
        args.paths, recursive=args.recursive, bit_depth=args.bit_depth,
        nonfinite="replace" if args.replace_nonfinite else "error",
    )
    for failure in report.failures:
        print(f"grainwright inspect: error: {failure['error']}", file=sys.stderr)
    if args.save_noise and report.model is not None:
        _save(report, args.save_noise, args.overwrite)
    if args.json:
        print(json.dumps(report.to_dict(), indent=1, allow_nan=False))
    else:
        print(format_text(report))
    if not report.images:
        print("grainwright inspect: error: no image could be inspected", file=sys.stderr)
        return 1
    return 1 if report.failures else 0


def _save(report, path: str, overwrite: bool) -> None:
    from pathlib import Path

    target = Path(path)
    remove_stale_temporaries(target.parent)
    if target.exists() and not overwrite:
        raise InputError(target, "already exists (use --overwrite to replace it)")
    first = report.images[0]
    header = (
        f"estimated by grainwright inspect from {report.summary['images']} image(s), layout '{report.layout}'\n"
        f"full range: native {first.low:g}..{first.high:g}"
        + (f" ({first.bit_depth}-bit)" if first.bit_depth else "")
        + "; one working unit = the full range"
    )
    save_noise(report.model, target, header=header)
