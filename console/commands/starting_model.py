"""``grainwright starting-model``: the shipped generic denoiser: use it with no training, or rebuild it.

``export`` writes the starting model as an ordinary ONNX file for your data (normalisation taken from your sample
images, transform from your noise description), so ``denoise`` and ``compare`` work before any training;
``show`` prints its manifest; ``train`` reproduces it from its recipe (``configs/starting-model.toml``); ``package`` writes a finished run as
the shipped weights and manifest (maintainers).
"""
from __future__ import annotations

import argparse
import json

from grainwright.console.torch_needed import require_torch

HELP = "the shipped starting model: export it for your data with no training, show its record, or rebuild it"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    actions = parser.add_subparsers(dest="starting_action", metavar="ACTION", required=True)
    export = actions.add_parser("export", help="write the starting model as an ONNX file for your data")
    export.add_argument("--samples", required=True, metavar="DIR",
                        help="folder (or file) of your images: dtype, bit depth, range and channels are taken "
                        "from them, and the export's parity check runs on them")
    export.add_argument("-o", "--output", required=True, metavar="MODEL.onnx", help="ONNX file to write")
    export.add_argument("--noise", metavar="noise.toml", help="your noise description (grainwright inspect "
                        "--save-noise): Poisson-Gaussian noise is then denoised in the Anscombe domain")
    export.add_argument("--bit-depth", type=int, metavar="N", help="effective bit depth of integer data "
                        "(default: detected from the samples)")
    export.add_argument("--int8", action="store_true", help="also write MODEL.int8.onnx, calibrated on the samples")
    export.add_argument("--overwrite", action="store_true", help="replace existing output files")
    export.add_argument("--threads", type=int, default=2, metavar="N", help="ONNX Runtime threads for the checks")

    actions.add_parser("show", help="print the starting model's manifest (recipe, steps, machine, figures)")

    train = actions.add_parser("train", help="train the starting model from its recipe (hours; resumable)")
    train.add_argument("--recipe", default="starting-model", metavar="RECIPE.toml",
                       help="the recipe (default: the shipped configs/starting-model.toml)")
    train.add_argument("--out", metavar="RUN_DIR", help="run folder to create")
    train.add_argument("--resume", metavar="RUN_DIR", help="continue a run exactly where it stopped")
    train.add_argument("--set", dest="assignments", metavar="KEY=VALUE", action="append", default=[],
                       help="override one recipe key, e.g. --set budget.steps=20 (repeatable)")

    package = actions.add_parser("package", help="write a finished recipe run as the shipped starting model "
                                 "(maintainers)")
    package.add_argument("run_dir", metavar="RUN_DIR", help="a finished run of the recipe")
    package.add_argument("--into", required=True, metavar="DIR", help="folder to write starting-model.pt and "
                         "starting-model.json into (the source tree's models/)")
    package.add_argument("--recipe", default="starting-model", metavar="RECIPE.toml",
                         help="the recipe the run followed, kept verbatim in the manifest (default: starting-model)")
    package.add_argument("--extra", metavar="FILE.json", help="a JSON object merged into the manifest (e.g. "
                         "benchmark figures)")


def run(args: argparse.Namespace) -> int:
    if args.starting_action == "show":  # a JSON file in the package: no torch needed to read it
        from importlib import resources

        from grainwright.inference.common.errors import GrainwrightError

        manifest = resources.files("grainwright.models").joinpath("starting-model.json")
        if not manifest.is_file():
            raise GrainwrightError(f"{manifest}: the starting model's manifest is not installed")
        print(manifest.read_text())
        return 0
    require_torch(f"starting-model {args.starting_action}")
    if args.starting_action == "export":
        from grainwright.models.starting import export_starting_model

        result = export_starting_model(args.samples, args.output, noise_path=args.noise, bit_depth=args.bit_depth,
                                       int8=args.int8, overwrite=args.overwrite, threads=args.threads, log=print)
        return 1 if result.int8_report is not None and not result.int8_report["passed"] else 0
    if args.starting_action == "package":
        from pathlib import Path

        from grainwright.trainer.generated import package_run

        extra = json.loads(Path(args.extra).read_text()) if args.extra else None
        manifest = package_run(args.run_dir, args.into, recipe_path=args.recipe, extra=extra)
        print(f"wrote {manifest['weights_file']} ({manifest['weights_bytes']} bytes, sha256 "
              f"{manifest['weights_sha256']}) and its manifest into {args.into}")
        return 0
    from grainwright.trainer.generated import train_generated

    summary, _ = train_generated(args.recipe, args.out, resume=args.resume, assignments=args.assignments)
    return 130 if summary["stopped"] == "interrupted" else 0
