"""``grainwright watch MODEL.onnx IN_DIR -o OUT_DIR``: denoise frames as they arrive in a folder, each exactly once.

The line service of :mod:`grainwright.inference.runtime.line_service`; docs/watch.md tells how to run it
under systemd. Exit codes: 0 stopped by SIGTERM/SIGINT (or idle with --exit-when-idle); 4 idle-stopped with
frames quarantined; 2 bad option, model or folder (one line, nothing touched); 3 another instance holds the watched
or the output folder.
"""
from __future__ import annotations

import argparse
import os
import signal
import sys

from grainwright.console import HELP_CAUTION
from grainwright.console.commands.denoise import add_engine_arguments, check_engine_arguments
from grainwright.inference.common.errors import GrainwrightError
from grainwright.inference.runtime.frame_engine import FrameEngine
from grainwright.inference.runtime.line_arrivals import ARRIVAL_RULES, DEFAULT_PATTERNS
from grainwright.inference.runtime.line_service import (
    INPUT_POLICIES,
    ExitCode,
    FolderHeld,
    LineService,
    LineSettings,
    describe_holder,
    holder,
)

EPILOG = ("exit codes: 0 stopped by SIGTERM/SIGINT or idle; 4 idle-stopped with frames quarantined; 2 bad option, "
          "model or folder; 3 the folder is held by another instance; 1 an unexpected error (traceback). SIGHUP "
          "reloads the model file. " + HELP_CAUTION)
HELP = "watch a folder and denoise each frame as it arrives (a long-running line service; no torch needed)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", help="the .onnx file written by 'grainwright export'")
    parser.add_argument("watch", metavar="IN_DIR", help="the folder frames arrive in (not descended into)")
    parser.add_argument("-o", "--out-dir", required=True,
                        help="output folder; also holds watch-journal.jsonl and watch-status.json")
    parser.add_argument("--arrival", choices=ARRIVAL_RULES, default="renamed",
                        help="when a file counts as complete: 'renamed' (the writer renames it in; taken at once) or "
                        "'stable' (size and time unchanged for --settle seconds; for writers that write in place "
                        "and for network shares). Default renamed")
    parser.add_argument("--settle", type=float, default=2.0, metavar="SECONDS",
                        help="with --arrival stable: how long a file must stay unchanged (default 2)")
    parser.add_argument("--patterns", default=",".join(DEFAULT_PATTERNS), metavar="GLOBS",
                        help="frame names, shell patterns separated by commas, case-insensitive (default "
                        f"{','.join(DEFAULT_PATTERNS)}); names starting with a dot are never frames")
    parser.add_argument("--inputs", choices=INPUT_POLICIES, default="keep",
                        help="after the output is durable: keep the input, move it to --done-dir, or delete it "
                        "(default keep)")
    parser.add_argument("--done-dir", metavar="DIR", help="with --inputs move (default IN_DIR/done)")
    parser.add_argument("--quarantine-dir", metavar="DIR",
                        help="frames given up, each with NAME.reason.txt (default IN_DIR/quarantine)")
    parser.add_argument("--retries", type=int, default=2, metavar="N",
                        help="attempts after the first for a frame that fails to read or run (default 2)")
    parser.add_argument("--retry-wait", type=float, default=2.0, metavar="SECONDS", help="between attempts")
    parser.add_argument("--poll", type=float, default=0.2, metavar="SECONDS", help="folder scan period")
    parser.add_argument("--queue-limit", type=int, default=1000, metavar="FRAMES",
                        help="frames held in memory (paths only); more wait in the folder, none is dropped")
    parser.add_argument("--status-every", type=float, default=5.0, metavar="SECONDS",
                        help="status file period (default 5)")
    parser.add_argument("--log-every", type=float, default=60.0, metavar="SECONDS",
                        help="one-line summary period (default 60)")
    parser.add_argument("--backoff-max", type=float, default=60.0, metavar="SECONDS",
                        help="longest pause between retries while the output is full or not writable")
    parser.add_argument("--lag-warning", type=float, default=10.0, metavar="SECONDS",
                        help="log a line when the oldest waiting frame is older than this")
    parser.add_argument("--exit-when-idle", type=float, metavar="SECONDS",
                        help="stop once nothing has waited for this long (catch-up runs, tests)")
    parser.add_argument("--reload", action="store_true",
                        help="do not start: ask the service running on IN_DIR to load the model file again")
    add_engine_arguments(parser)


def _send_reload(folder: str) -> int:
    found = holder(folder)
    if not found or not found.get("pid"):
        raise GrainwrightError(f"{folder}: no watch service holds this folder")
    try:
        os.kill(int(found["pid"]), signal.SIGHUP)
    except ProcessLookupError:
        raise GrainwrightError(f"{folder}: the service that held it ({describe_holder(found)}) is gone") from None
    print(f"asked {describe_holder(found)} to reload its model")
    return 0


def run(args: argparse.Namespace) -> int:
    if args.reload:
        return _send_reload(args.watch)
    check_engine_arguments(args)
    patterns = tuple(pattern.strip() for pattern in args.patterns.split(",") if pattern.strip())
    settings = LineSettings(
        watch=args.watch, out_dir=args.out_dir, patterns=patterns,
        arrival=args.arrival, settle=args.settle, poll=args.poll, retries=args.retries, retry_wait=args.retry_wait,
        inputs=args.inputs, done_dir=args.done_dir, quarantine_dir=args.quarantine_dir, queue_limit=args.queue_limit,
        status_every=args.status_every, log_every=args.log_every, backoff_max=args.backoff_max,
        lag_warning=args.lag_warning, exit_when_idle=args.exit_when_idle,
    )

    def open_engine() -> FrameEngine:
        return FrameEngine(args.model, threads=args.threads, tile=args.tile, batch=args.batch,
                           strength=args.strength, noise_sigma=args.noise_sigma, ensemble=args.ensemble,
                           fixed_pattern=args.fixed_pattern, out_format=args.format, as_float=args.float32)

    service = LineService(open_engine, settings)
    try:
        return int(service.run())
    except FolderHeld as error:
        print(f"grainwright watch: error: {error}", file=sys.stderr)
        return int(ExitCode.HELD)
