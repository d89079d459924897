"""``grainwright export``: a checkpoint or run folder to one self-contained ONNX file (needs PyTorch)."""
from __future__ import annotations

import argparse
from pathlib import Path

from grainwright.console.torch_needed import require_torch
from grainwright.inference.common.atomic import remove_stale_temporaries

HELP = "export a checkpoint or run folder to one self-contained ONNX file, optionally also INT8"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("source", metavar="CHECKPOINT_OR_RUN_DIR",
                        help="a checkpoint file, or a run folder (its checkpoints/best.pt is exported)")
    parser.add_argument("-o", "--output", required=True, metavar="MODEL.onnx", help="ONNX file to write")
    parser.add_argument("--calibration", metavar="DIR",
                        help="folder of your own images (same dtype and channels as in training): checked for "
                        "parity, and used to calibrate --int8")
    parser.add_argument("--int8", action="store_true",
                        help="also write MODEL.int8.onnx, statically quantised on --calibration images "
                        "(convolutions only; input, normalisation, skip path and output stay float32)")
    parser.add_argument("--min-int8-psnr", type=float, default=40.0, metavar="DB",
                        help="write the INT8 file only if its output is at least this close to the FP32 output "
                        "on held-out patches, as PSNR in dB (default 40)")
    parser.add_argument("--overwrite", action="store_true", help="replace existing output files")
    parser.add_argument("--record-data-path", action="store_true",
                        help="store the training data folder's full path in the model's metadata (by default only "
                        "its base name and the fingerprint of the training files travel with the model)")
    parser.add_argument("--threads", type=int, default=2, metavar="N",
                        help="ONNX Runtime threads for the checks (default 2)")


def run(args: argparse.Namespace) -> int:
    require_torch("export")
    from grainwright.models.export import export_checkpoint

    remove_stale_temporaries(Path(args.output).parent)  # ONNX files half-written by a killed export
    result = export_checkpoint(
        args.source, args.output, calibration=args.calibration, int8=args.int8,
        min_int8_psnr=args.min_int8_psnr, overwrite=args.overwrite,
        record_data_path=args.record_data_path, threads=args.threads, log=print,
    )
    if result.int8_report is not None and not result.int8_report["passed"]:
        return 1
    return 0
