"""``grainwright bench train``: each training scheme, time-boxed, against classical filters tuned on ground truth,
and the loop's throughput against bare forward+backward passes (needs PyTorch)."""
from __future__ import annotations

import argparse

from grainwright.console.torch_needed import require_torch

HELP = "training schemes vs classical filters tuned on ground truth; loop vs bare throughput"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--minutes-per-scheme", type=float, default=10.0, metavar="N",
                        help="time box of each scheme's training (default 10)")
    parser.add_argument("--steps-per-scheme", type=int, default=0, metavar="N",
                        help="train each scheme for N optimiser steps instead of the time box (fixed-step "
                        "comparisons on a shared machine; default 0: the time box)")
    parser.add_argument("--schemes", default="supervised,noise2noise,masked,neighbor2neighbor,recorrupted",
                        metavar="LIST", help="comma-separated schemes for the Gaussian case")
    parser.add_argument("--only-schemes", metavar="LIST",
                        help="train only these of each case's schemes, in every case (e.g. recorrupted,"
                        "neighbor2neighbor for the noisy-images-only rows); a case left with none is scored "
                        "without training")
    parser.add_argument("--cases", default="gaussian,poisson-gaussian,speckle", metavar="LIST",
                        help="comma-separated noise cases (also: speckle-4, gamma speckle of 4 looks trained with the "
                        "config's own scheme and no noise.toml)")
    parser.add_argument("--config", default="noisy-only", metavar="CONFIG",
                        help="training config for every scheme: a file or a shipped name (default noisy-only: the "
                             "model and patch regime of the recorded size search); its scheme is overridden")
    parser.add_argument("--set", action="append", metavar="KEY=VALUE",
                        help="override a config key for every scheme (repeatable), e.g. model.hyper.width=32")
    parser.add_argument("--half-scale", action="store_true",
                        help="also train on half-size copies (2x2 means) of the training images of at least 384 px")
    parser.add_argument("--train-on-scored", action="store_true",
                        help="train the noisy-images-only schemes on the noisy scored images themselves (never "
                        "their clean versions) instead of the training images, a strip of each held out for the "
                        "never-worse check (data.validation_split = \"regions\"): the case where the frames to "
                        "denoise are the training data")
    parser.add_argument("--no-throughput", dest="throughput", action="store_false",
                        help="skip the loop-vs-bare throughput measurement")
    parser.add_argument("--threads", type=int, default=0, metavar="N", help="torch threads (0 = physical cores)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the noise and of training")
    parser.add_argument("--json", metavar="FILE", help="also write the results as JSON, after every scheme; a "
                        "rerun with the same file and settings skips the schemes already done")
    parser.add_argument("--work", metavar="DIR", help="folder for the generated data and run folders "
                        "(default: a temporary folder, removed afterwards)")


def run(args: argparse.Namespace) -> int:
    require_torch("bench train")
    from grainwright.benchmarks.training import run_bench

    return run_bench(args)
