"""``grainwright bench sizes``: does the size picker's predicted time hold, and what does each size buy?

``--check-prediction`` (the default): for three target times per frame, pick the rung of the size ladder
(``grainwright.trainer.sizing``) predicted from a machine profile (``--profile``, or measured now), export it,
time the file-to-file ``denoise`` path on a generated frame of that size and report predicted against measured.

``--sweep``: the recorded quality search of ``grainwright.benchmarks.size_search`` (architectures, patch regimes, learning
rate, self-ensemble size, Poisson-Gaussian and speckle cases) against classical filters tuned on ground truth.

Both need PyTorch (to build and export the models); the profile itself is measured torch-free.
"""
from __future__ import annotations

import argparse
from pathlib import Path

from grainwright.console.torch_needed import require_torch
from grainwright.inference.common.errors import ConfigError

HELP = "model sizes: predicted vs measured time per frame (--check-prediction), quality search (--sweep)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    mode = parser.add_mutually_exclusive_group()
    mode.add_argument("--check-prediction", action="store_true", help="predicted vs measured denoise time (default)")
    mode.add_argument("--sweep", action="store_true", help="the recorded quality search (long: run it in the "
                      "background)")
    parser.add_argument("--profile", metavar="PROFILE.json", help="machine profile (default: measure this machine)")
    parser.add_argument("--frame", default="1024x1024", metavar="WxH", help="frame size in pixels (default 1024x1024)")
    parser.add_argument("--targets-ms", metavar="LIST", help="target times per frame, ms, commas (default: three, "
                        "between the predictions of a small, a middle and a large rung)")
    parser.add_argument("--threads", type=int, default=2, metavar="N", help="threads (default 2)")
    parser.add_argument("--repeat", type=int, default=3, metavar="N", help="interleaved timings per target (median)")
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON (the sweep reads it first)")
    parser.add_argument("--work", default="sweep-work", metavar="DIR", help="--sweep: generated data and runs")
    parser.add_argument("--stages", default="architecture,regime,noise,long", metavar="LIST",
                        help="--sweep: stages to run (architecture, larger, regime, noise, long)")
    parser.add_argument("--cpu-seconds", type=float, default=120.0, metavar="S",
                        help="--sweep: CPU-seconds of training per trial (the full budget is 1200 = 10 min x 2 cores)")
    parser.add_argument("--long-cpu-seconds", type=float, default=600.0, metavar="S",
                        help="--sweep: CPU-seconds for the winner's longer run")
    parser.add_argument("--long-steps", type=int, default=0, metavar="N",
                        help="--sweep: give the winner's longer run exactly N steps instead")
    parser.add_argument("--seed", type=int, default=0, help="--sweep: seed of the noise and of training")


def run(args: argparse.Namespace) -> int:
    require_torch("bench sizes")
    if args.sweep:
        from grainwright.benchmarks.size_search import run_search

        if not args.json:
            args.json = "sweep.json"
        return run_search(args)

    from grainwright.inference.runtime.machine_profile import (
        load_profile,
        measure_profile,
        save_profile,
    )
    from grainwright.trainer.sizing import (
        check_prediction,
        default_targets,
        ladder,
        parse_frame,
    )

    frame = parse_frame(args.frame)
    profile = load_profile(args.profile) if args.profile else None
    rungs = ladder()
    if args.targets_ms:
        try:
            targets = [float(value) for value in args.targets_ms.split(",") if value.strip()]
        except ValueError:
            raise ConfigError(f"--targets-ms: expected numbers separated by commas, got {args.targets_ms!r}") from None
    else:
        print(f"measuring this machine's profile ({args.threads} threads) for the default targets:", flush=True)
        targets = default_targets(profile or measure_profile(threads=args.threads), frame, rungs)
    source = args.profile or "a fresh FP32 profile of this machine measured in each round"
    print(f"predicted ({source}) vs measured denoise time per {frame[0]}x{frame[1]} 16-bit frame, "
          f"{args.threads} threads, {args.repeat} interleaved rounds:", flush=True)
    rows = check_prediction(frame, targets, threads=args.threads, repeats=args.repeat, profile=profile)
    within = all(abs(row["error"]) <= 0.2 for row in rows)
    print(f"all predictions within 20% of the measured time: {'yes' if within else 'no'}")
    if args.json:
        save_profile({"profile": args.profile, "frame": list(frame), "threads": args.threads, "rows": rows,
                      "within_20_percent": within}, Path(args.json))
    return 0
