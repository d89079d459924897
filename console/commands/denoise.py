"""``grainwright denoise MODEL.onnx INPUT... -o OUT_DIR``: run an exported model on files, tiled, torch-free."""
from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Iterable

from tqdm import tqdm

from grainwright.console import HELP_CAUTION
from grainwright.inference.common.errors import ConfigError
from grainwright.inference.runtime.batch import FIXED_PATTERN_MODES, FileResult, denoise_files, plan_batch
from grainwright.inference.runtime.faults import Fault
from grainwright.inference.runtime.runner import (
    ENSEMBLE_SIZES,
    NOISE_SIGMA_MODES,
    ModelSpec,
    OnnxDenoiser,
)

HELP = "denoise images with an exported ONNX model (tiled, bounded memory, resumable; no torch needed)"
EPILOG = HELP_CAUTION


def _noise_sigma(text: str) -> float | str:
    if text in NOISE_SIGMA_MODES:
        return text
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number (native units) or one of {NOISE_SIGMA_MODES}") from None
    if not value >= 0:
        raise argparse.ArgumentTypeError("the noise level must be >= 0")
    return value


def add_engine_arguments(parser: argparse.ArgumentParser) -> None:
    """The options that choose how the model runs and what it writes; shared with ``watch``."""
    parser.add_argument("--format", choices=("tif", "png", "npy"), help="write this format instead of the input's")
    parser.add_argument("--float32", action="store_true",
                        help="write float32 native values, unclipped (TIFF or npy) instead of the input's dtype")
    parser.add_argument("--tile", type=int, metavar="PIXELS",
                        help="edge of each tile's kept region (default: measured, grows with the model's margin)")
    parser.add_argument("--batch", type=int, metavar="TILES", help="tiles per ONNX Runtime call (default: measured)")
    parser.add_argument("--strength", type=float, default=1.0, metavar="S",
                        help="noise-map models: factor on the noise map; other models: output = input + "
                        "S * (model output - input). Default 1.0")
    parser.add_argument("--noise-sigma", type=_noise_sigma, default="auto", metavar="LEVEL",
                        help="noise-map models: 'auto' (default: 'model' for a model working in the Anscombe or log "
                        "domain with a per-pixel noise model and for a supervised model of signal-dependent noise, "
                        "else 'estimate'), a noise standard deviation in native units, 'estimate' (per image), "
                        "'training' (the level in the model's metadata) or 'model' (per pixel, from the training "
                        "noise model, e.g. Poisson-Gaussian)")
    parser.add_argument("--ensemble", type=int, choices=ENSEMBLE_SIZES, default=1,
                        help="average over 1, 2, 4 or 8 flips and 90-degree rotations (costs that many runs)")
    parser.add_argument("--threads", type=int, metavar="N", help="ONNX Runtime threads (default: all cores)")
    parser.add_argument("--fixed-pattern", choices=FIXED_PATTERN_MODES, default="auto",
                        help="remove row/column banding before denoising: auto (when detected in the frame, as the "
                        "trainer does), always or never; not applied to streamed large TIFFs")


def check_engine_arguments(args: argparse.Namespace) -> None:
    """Refuse engine options that cannot work together, in one line."""
    if args.float32 and args.format == "png":
        raise ConfigError("--float32 needs TIFF or npy output, not PNG")
    for name in ("tile", "batch", "threads"):
        value = getattr(args, name)
        if value is not None and value < 1:
            raise ConfigError(f"--{name} must be at least 1, got {value}")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", help="the .onnx file written by 'grainwright export'")
    parser.add_argument("inputs", nargs="+", metavar="INPUT", help="image files, folders or glob patterns")
    parser.add_argument("-o", "--out-dir", required=True, help="output folder; names mirror the inputs")
    parser.add_argument("-r", "--recursive", action="store_true", help="descend into sub-folders of folder inputs")
    parser.add_argument("--overwrite", action="store_true", help="redo and replace existing outputs")
    parser.add_argument("--keep-mixed", action="store_true",
                        help="go on although existing outputs were made with another model or settings")
    parser.add_argument("--into-input-folder", action="store_true", help="allow -o to be an input's own folder")
    parser.add_argument("--slice-wise", action="store_true",
                        help="with a single-frame model: denoise each frame (slice) of a stack or volume on its own, "
                        "frame by frame, keeping the file's axes and voxel size (for anisotropic volumes whose "
                        "neighbouring slices differ too much to help)")
    parser.add_argument("--frame-folders", action="store_true",
                        help="read each folder given as one stack of numbered frames (name order, no gaps) and "
                        "write it as one stack file OUT/FOLDER.tif (.npy with --format npy)")
    add_engine_arguments(parser)
    parser.add_argument("--receptive-field", type=int, metavar="PIXELS",
                        help="for a model without grainwright metadata: its receptive field (odd, pixels)")
    parser.add_argument("--alignment", type=int, default=1, metavar="N",
                        help="with --receptive-field: input sizes must be multiples of N (default 1)")
    cluster = parser.add_mutually_exclusive_group()
    cluster.add_argument("--scheduler", metavar="ADDRESS",
                         help="fan the files out to the Dask cluster of this scheduler (e.g. tcp://host:8786); inputs "
                         "and outputs must be on a filesystem every worker sees under the same paths; --threads is "
                         "then ONNX Runtime threads per file (default 1, one file per worker thread). Needs the "
                         "'cluster' extra")
    cluster.add_argument("--local-workers", type=int, metavar="N",
                         help="start a Dask cluster of N worker processes on this machine and fan the files out to "
                         "it; --threads per file defaults to the cores divided by N. Needs the 'cluster' extra")
    parser.add_argument("-q", "--quiet", action="store_true", help="no progress bars")


def run(args: argparse.Namespace) -> int:
    check_engine_arguments(args)
    if args.local_workers is not None and args.local_workers < 1:
        raise ConfigError(f"--local-workers must be at least 1, got {args.local_workers}")
    on_cluster = args.scheduler is not None or args.local_workers is not None
    if on_cluster:  # before the model is loaded: say at once when the extra is missing
        from grainwright.inference.runtime import cluster

        cluster.require_distributed()
    spec = None
    if args.receptive_field is not None:
        spec = ModelSpec(receptive_field=args.receptive_field, alignment=args.alignment)
    denoiser = OnnxDenoiser(
        args.model, threads=1 if on_cluster else args.threads, tile=args.tile, batch=args.batch,
        strength=args.strength, noise_sigma=args.noise_sigma, ensemble=args.ensemble, spec=spec,
    )
    start = time.perf_counter()
    options = {"recursive": args.recursive, "out_format": args.format, "as_float": args.float32,
               "overwrite": args.overwrite, "keep_mixed": args.keep_mixed,
               "into_input_folder": args.into_input_folder, "fixed_pattern": args.fixed_pattern,
               "slice_wise": args.slice_wise, "frame_folders": args.frame_folders}
    if not on_cluster:
        counts, megapixels, stopped = _report(
            denoise_files(denoiser, args.inputs, args.out_dir, progress=not args.quiet, **options))
    else:
        jobs, expected = plan_batch(denoiser, args.inputs, args.out_dir, **options)
        threads = args.threads or cluster.default_threads(args.local_workers)
        with cluster.connect(args.scheduler, args.local_workers) as client:
            counts, megapixels, stopped = _report(cluster.denoise_on_cluster(
                client, denoiser, jobs, expected, threads=threads, overwrite=args.overwrite,
                as_float=args.float32, fixed_pattern=args.fixed_pattern, progress=not args.quiet))
    seconds = time.perf_counter() - start
    rate = megapixels / seconds if seconds > 0 else 0.0
    print(f"done {counts['done']}, skipped {counts['skipped']}, failed {counts['failed']} "
          f"in {seconds:.1f} s ({megapixels:.1f} MP, {rate:.2f} MP/s)")
    if stopped is not None:
        print(f"stopped early ({stopped.kind.value}): the remaining inputs were not attempted; {counts['done']} "
              "output(s) written are kept and a rerun skips them", file=sys.stderr)
    return 1 if counts["failed"] else 0


def _report(results: Iterable[FileResult]) -> tuple[dict[str, int], float, Fault | None]:
    """Print one line per failed, skipped or warned-about file; count them; the fault that stopped the batch."""
    counts = {"done": 0, "skipped": 0, "failed": 0}
    megapixels, stopped = 0.0, None
    for result in results:
        counts[result.status] += 1
        if result.fault is not None and result.fault.kind.stops_batch:
            stopped = result.fault
        megapixels += result.megapixels
        for note in result.warnings:
            tqdm.write(f"warning: {result.source}: {note}", file=sys.stderr)
        if result.status == "failed":
            tqdm.write(f"failed: {result.message}", file=sys.stderr)
        elif result.status == "skipped":
            tqdm.write(f"skipped: {result.source}: {result.message}", file=sys.stderr)
    return counts, megapixels, stopped
