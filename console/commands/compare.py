"""``grainwright compare``: rank learned models and classical filters on your images, with a detail-loss check."""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from grainwright.benchmarks.size_plot import size_search_svg
from grainwright.console import HELP_CAUTION
from grainwright.inference.common.atomic import remove_stale_temporaries
from grainwright.inference.common.errors import ConfigError
from grainwright.inference.evaluation.compare import (
    NOISE_CHOICES,
    CompareOptions,
    run_comparison,
)

HELP = "compare ONNX models and classical filters on your images (with or without clean references)"
EPILOG = HELP_CAUTION


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--noisy", required=True, metavar="DIR", help="folder of noisy images (PNG, TIFF, .npy)")
    parser.add_argument("--clean", metavar="DIR",
                        help="clean images matched to the noisy ones by file name (enables PSNR, SSIM, MS-SSIM and "
                             "parameters tuned on ground truth)")
    parser.add_argument("--methods", required=True, action="append", metavar="LIST",
                        help="comma-separated .onnx files and baseline names, or all-classical (repeatable)")
    parser.add_argument("-o", "--out", required=True, metavar="REPORT_DIR",
                        help="report folder: results.csv, results.json, index.html")
    parser.add_argument("--rois", metavar="FILE.json",
                        help='regions of interest: {"image.png": {"name": {"feature": [x, y, w, h], '
                             '"background": [x, y, w, h]}}}; without it regions are found automatically')
    parser.add_argument("--quick", action="store_true",
                        help="small parameter grids and crops, for demos and a first look")
    parser.add_argument("--noise", choices=NOISE_CHOICES, default="auto",
                        help="noise model for SURE and the classical filters (default: auto, from the data)")
    parser.add_argument("--threads", type=int, metavar="N", help="ONNX Runtime threads (default: all cores)")
    parser.add_argument("--sure-probes", type=int, default=1, metavar="N",
                        help="Monte-Carlo SURE probes per method and image (default 1)")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing report folder")
    parser.add_argument("--ensemble-rows", type=int, choices=(1, 2, 4, 8), default=1, metavar="N",
                        help="also score every .onnx model with N flips/rotations averaged (denoise --ensemble N), "
                        "as a row of its own labelled 'NAME xN' (default 1: no such rows)")
    parser.add_argument("--stacks", action="store_true",
                        help="the folders hold stacks (sequences, volumes; matched by name): per-slice PSNR/SSIM, a "
                        "slice view, and the K-frame average ('frame-average') and per-frame BM3D ('bm3d') as "
                        "classical rows; methods are .onnx files, frame-average and bm3d")
    parser.add_argument("--stack-frames", type=int, default=5, metavar="K",
                        help="with --stacks: frames of the frame-average row (odd, default 5)")
    sizes = parser.add_argument_group("model sizes tried (from 'grainwright bench sizes --sweep')")
    sizes.add_argument("--size-search", metavar="RESULTS.json", help="add a quality-versus-time plot of the sizes "
                       "in this size-search results file")
    sizes.add_argument("--profile", metavar="PROFILE.json", help="machine profile for the predicted times "
                       "('grainwright bench runtime --profile-out')")
    sizes.add_argument("--frame", default="1024x1024", metavar="WxH", help="frame size for the predicted times")
    sizes.add_argument("--ms-per-frame", type=float, metavar="T",
                       help="cycle-time target: drawn on the plot, and the chosen size is the best under it")


def _run_stacks(args: argparse.Namespace) -> int:
    from grainwright.inference.evaluation.stack_compare import compare_stacks

    methods = [item.strip() for entry in args.methods for item in entry.split(",") if item.strip()]
    document = compare_stacks(args.noisy, methods, args.out, clean_dir=args.clean, frames=args.stack_frames,
                              threads=args.threads, log=lambda line: print(line, file=sys.stderr))
    for stack, rows in document["means"].items():
        print(stack)
        for method, figures in rows.items():
            quality = (f"PSNR {figures['psnr']:.2f} dB, SSIM {figures['ssim']:.4f}" if "psnr" in figures
                       else f"noise left {figures['noise_left']:.3g}")
            print(f"  {method:<40} {quality} (mean over slices)")
    return 0


def run(args: argparse.Namespace) -> int:
    for folder in (Path(args.out).parent, Path(args.out)):
        remove_stale_temporaries(folder)  # report folders or files half-written by a killed comparison
    if args.stacks:
        if args.ensemble_rows != 1:
            raise ConfigError("--ensemble-rows scores single images; it does not apply with --stacks")
        return _run_stacks(args)
    size_plot = None
    if args.size_search:
        if not args.profile:
            raise ConfigError("--size-search needs --profile PROFILE.json (the machine the times are predicted for)")
        size_plot = size_search_svg(args.size_search, args.profile, args.frame, args.ms_per_frame)
    options = CompareOptions(
        quick=args.quick,
        noise=args.noise,
        threads=args.threads,
        sure_probes=max(1, args.sure_probes),
        overwrite=args.overwrite,
        size_plot=size_plot,
        ensemble_rows=args.ensemble_rows,
    )
    result = run_comparison(
        args.noisy,
        args.methods,
        args.out,
        clean_dir=args.clean,
        rois=args.rois,
        options=options,
        log=lambda line: print(line, file=sys.stderr),
    )
    key, label = ("psnr", "PSNR") if result.ground_truth else ("sure_psnr", "SURE estimated PSNR")
    print(f"{'rank':>4}  {'method':<24} {label:>20}  {'s/MP':>8}  parameter choice")
    for entry in result.ranking:
        quality = "unusable" if entry[key] is None else f"{entry[key]:.2f} dB"
        print(f"{entry['rank']:>4}  {entry['method']:<24} {quality:>20}  "
              f"{entry['seconds_per_megapixel']:>8.3f}  {entry['parameter_choice']}")
    for finding in result.findings:
        print(f"- {finding}")
    print(f"report: {result.report_dir / 'index.html'}")
    return 0
