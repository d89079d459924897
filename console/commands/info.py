"""``grainwright info``: show what an exported model carries (torch-free)."""
from __future__ import annotations

import argparse
import json

from grainwright.inference.runtime.modelinfo import (
    model_io,
    read_model_metadata,
    render_metadata,
)

HELP = "show an exported model's description: architecture, sizes, tiling, normalisation, training, parity"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODEL.onnx", help="a model written by 'grainwright export'")
    parser.add_argument("--json", action="store_true", help="print the raw JSON document instead")


def run(args: argparse.Namespace) -> int:
    metadata = read_model_metadata(args.model)
    if args.json:
        print(json.dumps(metadata, indent=2))
    else:
        print(f"{args.model}")
        print(render_metadata(metadata, model_io(args.model)))
    return 0
