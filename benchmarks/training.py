"""``grainwright bench train``: each training scheme, time-boxed, against classical filters tuned on ground truth.

Data (open data, grayscale): scikit-image's bundled sample images. The networks train on ``TRAIN_IMAGES`` (centre
crops of at most ``TRAIN_EDGE`` pixels; ``--half-scale`` adds half-size copies of the larger ones) and are scored on
the held-out ``TEST_IMAGES`` (at most ``TEST_EDGE``), which they never see. Noise cases: Gaussian (sigma 25/255,
every scheme), Poisson-Gaussian and gamma speckle (a supervised and a self-supervised scheme each), and
``speckle-4`` (gamma speckle of 4 looks; only the config's own scheme, on the noisy images alone without a
``noise.toml``, so the trainer's noise analysis decides scheme and transform; its opponent is the per-image best of
TV, NLM and wavelet, not BM3D; not in the default ``--cases``). Noisy images are
float32 and unclipped. Each scheme trains with ``grainwright train`` for ``--minutes-per-scheme`` minutes, with the
settings of a shipped config (``--config``, default ``noisy-only``: the model and patch regime of the recorded size
search) and any ``--set`` overrides; the scheme and the time box are the benchmark's. Each trained model is exported
to ONNX and scored through the torch-free runtime, alone and with the runtime's 8-member flip/rotation
self-ensemble.

Opponent: for each held-out image, the best PSNR among total-variation denoising (Chambolle), non-local means,
wavelet shrinkage (scikit-image, through ``grainwright.inference.baselines``) and our BM3D, each with its
parameter grid tuned on that image's ground truth, which no real user has.

Throughput: the training loop (patch sampling, synthetic noise, schedule, logging included) against bare
forward+backward+Adam passes of the same model in the same layout and precision on tensors made once,
alternated in the same run.
"""
from __future__ import annotations

import argparse
import json
import shutil
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import torch

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images.crops import centre_crop

TEST_IMAGES = ("camera", "coins", "moon")
TRAIN_IMAGES = ("brick", "grass", "gravel", "chelsea", "coffee", "rocket", "page", "text", "clock", "cell",
                "immunohistochemistry", "hubble_deep_field", "retina", "shepp_logan_phantom")
TEST_EDGE, TRAIN_EDGE = 512, 1024  # largest centre crops of the held-out and the training images
HALF_SCALE_MIN_EDGE = 384  # with --half-scale, training images at least this big also train at half size
HALF = "@half"  # the suffix naming a half-size copy in the list of training images
CASES: dict[str, dict[str, Any]] = {
    "gaussian": {"noise": {"kind": "gaussian", "sigma": 25.0 / 255.0}, "label": "Gaussian, sigma 25/255"},
    "poisson-gaussian": {"noise": {"kind": "poisson-gaussian", "gain": 0.01, "read": 0.02},
                         "label": "Poisson-Gaussian, gain 0.01, read 0.02 (fractions of the range)",
                         "schemes": ("supervised", "recorrupted")},
    "speckle": {"noise": {"kind": "speckle-gamma", "looks": 10.0}, "label": "gamma speckle, 10 looks",
                "schemes": ("supervised", "neighbor2neighbor")},
    # The config as shipped decides alone: no noise.toml, its own scheme, scheme and transform from the analysis.
    "speckle-4": {"noise": {"kind": "speckle-gamma", "looks": 4.0},
                  "label": "gamma speckle, 4 looks, noisy images only, the config's own scheme, no noise.toml",
                  "schemes": ("as configured",), "baselines": ("tv", "nlm", "wavelet")},
}
AS_CONFIGURED = "as configured"  # the pseudo-scheme that leaves the scheme to the config (auto: the analysis)
SUPERVISED = ("supervised",)
SELF_SUPERVISED = ("masked", "neighbor2neighbor", "recorrupted")
SEARCH_BASELINES = ("tv", "nlm", "wavelet", "bm3d")
# BM3D's full ground-truth grid for the Gaussian case; the published hard threshold 2.7 sigma (Dabov et al.
# 2007) and the defaults for the others, where a full grid would cost more than the networks' training.
SHORT_GRIDS = {"bm3d": [{"threshold": 2.7}]}
OPPONENT = "opponent (best of TV/NLM/wavelet/BM3D, tuned on ground truth)"
BASELINE_LABELS = {"tv": "TV", "nlm": "NLM", "wavelet": "wavelet", "bm3d": "BM3D (ours)"}
ENSEMBLE = 8  # the runtime's largest flip/rotation self-ensemble
ENSEMBLES = (1, 2, 4, 8)  # self-ensemble sizes, members in the runtime's order (runner.ENSEMBLE_TRANSFORMS)
ENSEMBLE_LABEL = f", x{ENSEMBLE} self-ensemble"


def sample_image(name: str, edge: int = TEST_EDGE) -> np.ndarray:
    """A scikit-image sample image as float32 grayscale in [0, 1] (at most ``edge`` x ``edge``, centre crop)."""
    from skimage import data
    from skimage.color import rgb2gray

    image = getattr(data, name)()
    if image.ndim == 3:
        image = rgb2gray(image[..., :3])
    elif image.dtype == np.uint8:
        image = image / 255.0
    return np.ascontiguousarray(np.clip(centre_crop(image, edge), 0.0, 1.0), dtype=np.float32)


def training_labels(half_scale: bool = False) -> list[str]:
    """The training images: ``TRAIN_IMAGES`` and, with ``half_scale``, a half-size copy (``name@half``) of each
    whose shorter side is at least ``HALF_SCALE_MIN_EDGE`` pixels."""
    labels = list(TRAIN_IMAGES)
    if half_scale:
        labels += [name + HALF for name in TRAIN_IMAGES
                   if min(sample_image(name, TRAIN_EDGE).shape) >= HALF_SCALE_MIN_EDGE]
    return labels


def training_image(label: str) -> np.ndarray:
    """One training image of ``training_labels``: a half-size copy is the mean of each 2x2 cell of the crop
    (finer detail per pixel, the standard deviation of the image's own noise halved; the benchmark's noise is
    added afterwards)."""
    image = sample_image(label.removesuffix(HALF), TRAIN_EDGE)
    if label.endswith(HALF):
        h, w = image.shape[0] // 2 * 2, image.shape[1] // 2 * 2
        image = image[:h, :w].reshape(h // 2, 2, w // 2, 2).mean(axis=(1, 3))
    return np.ascontiguousarray(image, dtype=np.float32)


def make_folders(work: Path, case: str, seed: int, labels: list[str] | None = None) -> dict[str, Any]:
    """Write the training folders of ``case`` (clean-only + noise.toml, noisy-pairs, noisy-only) from the training
    images ``labels`` (default ``TRAIN_IMAGES``) and return the held-out clean and noisy images."""
    from grainwright.inference.images.imageio import write_image
    from grainwright.inference.noise.models import noise_from_dict, save_noise

    noise = noise_from_dict(CASES[case]["noise"])
    rng = np.random.default_rng([seed, len(case)])
    root = work / case
    for index, name in enumerate(labels or TRAIN_IMAGES):
        clean = training_image(name)[..., None]
        for folder, array in (("clean-only/clean", clean), ("noisy-pairs/noisy-a", noise.sample(clean, rng)),
                              ("noisy-pairs/noisy-b", noise.sample(clean, rng)),
                              ("noisy-only/noisy", noise.sample(clean, rng))):
            write_image(root / folder / f"{index:02d}-{name.replace('@', '-')}.npy", np.asarray(array, dtype=np.float32),
                        overwrite=True)
    save_noise(noise, root / "clean-only" / "noise.toml")
    held_out = {name: sample_image(name) for name in TEST_IMAGES}
    rng = np.random.default_rng([seed, len(case), 1])  # its own stream: the same noise whatever is trained on
    noisy = {name: noise.sample(image[..., None], rng)[..., 0] for name, image in held_out.items()}
    return {"root": root, "clean": held_out, "noisy": noisy}


def train_on_scored(made: dict[str, Any]) -> None:
    """Make the noisy-only folder hold the noisy scored images themselves (the very arrays scored; never their
    clean versions) instead of the training images: the case where the frames to denoise are the training data."""
    from grainwright.inference.images.imageio import write_image

    folder = made["root"] / "noisy-only" / "noisy"
    shutil.rmtree(folder)
    for name, noisy in made["noisy"].items():
        write_image(folder / f"scored-{name}.npy", np.asarray(noisy[..., None], dtype=np.float32))


def case_baselines(case: str) -> tuple[str, ...]:
    """The classical baselines the case's opponent is the per-image best of (default ``SEARCH_BASELINES``)."""
    return tuple(CASES[case].get("baselines", SEARCH_BASELINES))


def opponent_label(case: str) -> str:
    """The name of the case's opponent row: the per-image best of its baselines, tuned on ground truth."""
    names = case_baselines(case)
    if names == SEARCH_BASELINES:
        return OPPONENT
    return f"opponent (best of {'/'.join(BASELINE_LABELS[name].removesuffix(' (ours)') for name in names)}, tuned on ground truth)"


def opponent(case: str, images: dict[str, tuple[np.ndarray, np.ndarray]]) -> dict[str, dict[str, Any]]:
    """PSNR (dB, peak 1) of each classical baseline of the case (``case_baselines``) tuned on each image's ground
    truth, its parameters and CPU seconds, and the per-image best (``"best per image"``). ``images`` maps a name
    to ``(clean, noisy)``, ``(H, W, 1)`` float32."""
    from grainwright.inference.evaluation.calibration import tune_on_ground_truth

    noise = CASES[case]["noise"]
    table: dict[str, dict[str, Any]] = {}
    for method in case_baselines(case):
        started = time.process_time()
        table[method] = {"psnr": {}, "params": {}}
        for name, (clean, noisy) in images.items():
            grid = SHORT_GRIDS.get(method) if case != "gaussian" else None
            tuning = tune_on_ground_truth(method, noisy, clean, noise, peak=1.0, grid=grid)
            table[method]["psnr"][name] = float(tuning.score)
            table[method]["params"][name] = tuning.params
        table[method]["cpu_seconds"] = time.process_time() - started
        print(f"   {method} tuned on ground truth: {np.mean(list(table[method]['psnr'].values())):.2f} dB",
              flush=True)
    table["best per image"] = {"psnr": {name: max(table[m]["psnr"][name] for m in case_baselines(case))
                                        for name in images}}
    return table


def ensemble_member(image: np.ndarray, member: tuple[bool, bool, bool], inverse: bool = False) -> np.ndarray:
    """Apply (or undo) one self-ensemble member (transpose, flip rows, flip columns) to an ``(H, W, C)`` image,
    in the runtime's order: flips then transpose, undone as transpose then flips."""
    transpose, flip_rows, flip_cols = member
    if inverse and transpose:
        image = image.transpose(1, 0, 2)
    if flip_rows:
        image = image[::-1]
    if flip_cols:
        image = image[:, ::-1]
    if not inverse and transpose:
        image = image.transpose(1, 0, 2)
    return np.ascontiguousarray(image)


def runtime_denoiser(onnx_path: Path, threads: int) -> Any:
    """The runtime's denoiser for an exported model; noise-map models get the per-pixel map of their training
    noise model."""
    from grainwright.inference.runtime.modelinfo import read_model_metadata
    from grainwright.inference.runtime.runner import OnnxDenoiser

    takes_map = bool(read_model_metadata(onnx_path).get("takes_noise_map"))
    return OnnxDenoiser(onnx_path, threads=threads, noise_sigma="model" if takes_map else "estimate")


def ensemble_scores(denoiser: Any, images: dict[str, tuple[np.ndarray, np.ndarray]],
                    ensembles: tuple[int, ...] = ENSEMBLES) -> dict[str, Any]:
    """PSNR (dB, peak 1) of a runtime ``OnnxDenoiser`` (ensemble 1) with each self-ensemble size in ``ensembles``:
    one pass per member, partial averages, the members in the runtime's order; and the seconds each size costs."""
    from grainwright.inference.evaluation.metrics import psnr
    from grainwright.inference.runtime.runner import ENSEMBLE_TRANSFORMS

    scores: dict[int, dict[str, float]] = {size: {} for size in ensembles}
    seconds = {size: 0.0 for size in ensembles}
    for name, (clean, noisy) in images.items():
        total, elapsed = None, 0.0
        for count, member in enumerate(ENSEMBLE_TRANSFORMS[: max(ensembles)], start=1):
            started = time.perf_counter()
            output = ensemble_member(denoiser.run(ensemble_member(noisy, member), as_float=True), member, inverse=True)
            elapsed += time.perf_counter() - started
            total = output if total is None else total + output
            if count in ensembles:
                scores[count][name] = float(psnr(clean, total / count, peak=1.0))
                seconds[count] += elapsed
    return {"psnr": {str(size): row for size, row in scores.items()},
            "mean": {str(size): float(np.mean(list(row.values()))) for size, row in scores.items()},
            "seconds": {str(size): value for size, value in seconds.items()}}


def score_run(run_dir: Path, images: dict[str, tuple[np.ndarray, np.ndarray]], threads: int,
              checkpoint: str = "best") -> dict[str, Any]:
    """Export a run folder's checkpoint (``best``, or ``start``: the state it started from) to ONNX and score it
    through the runtime, with 1 and 8 members."""
    from grainwright.models.export import export_checkpoint

    onnx_path = run_dir / f"model-{checkpoint}.onnx"
    source = run_dir if checkpoint == "best" else run_dir / "checkpoints" / f"{checkpoint}.pt"
    export_checkpoint(source, onnx_path, overwrite=True, threads=threads)
    return ensemble_scores(runtime_denoiser(onnx_path, threads), images, ensembles=(1, ENSEMBLE))


def common_settings(args: argparse.Namespace) -> list[str]:
    """The ``--set`` overrides every benchmark run gets (the user's own may change the validation split)."""
    regions = ['data.validation_split="regions"'] if getattr(args, "train_on_scored", False) else []
    return regions + list(args.set or []) + [f"threads={args.threads}", f"seed={args.seed}",
                                             "logging.progress=false"]


def train_scheme(folder: Path, scheme: str | None, out: Path, minutes: float, args: argparse.Namespace) -> dict[str, Any]:
    """Train one scheme for ``minutes``, or for ``--steps-per-scheme`` optimiser steps when given (comparisons of
    settings on a shared machine)."""
    from grainwright.trainer.run import train_command

    settings = common_settings(args) + ["validation.every_steps=50", "validation.patches=32",
                                        "validation.patience=0", "checkpoint.every_minutes=2"]
    steps = getattr(args, "steps_per_scheme", 0) or None
    summary, _ = train_command(args.config, str(folder), scheme=scheme, minutes=None if steps else minutes,
                               steps=steps, out=str(out), assignments=settings,
                               announce=lambda text: print(f"    {text}", flush=True))
    return summary


def starting_label(scheme: str) -> str:
    """The row of the state a scheme's run started from (the starting model alone, no training on these data)."""
    return f"{scheme}: its start alone (no training)"


def measure_throughput(folder: Path, work: Path, args: argparse.Namespace, steps: int = 1000,
                       rounds: int = 3) -> dict[str, Any]:
    """Patches per second of the training loop (supervised, synthetic noise) and of bare forward+backward+Adam
    passes of the same model on one pre-made batch of the same data, alternated ``rounds`` times after one
    short warm-up round of each (not counted: it pays the process's one-time imports and allocations).

    The loop's figure is the whole ``train`` call, one-off costs included (first and last checkpoint, final
    validation, TensorBoard writer); ``steps`` (about half a minute with bfloat16 steps) makes them weigh about
    what they weigh in a run of minutes. The loop's own per-step rate (sampling, noise, step, clipping, logging;
    no one-off costs) is reported beside it."""
    import copy

    from grainwright.trainer.config import load_config
    from grainwright.trainer.loop import (
        make_optimizer,
        step_precision,
        to_tensors,
        train,
    )
    from grainwright.trainer.run import create_run_folder, physical_cores, prepare
    from grainwright.trainer.schemes.base import apply_model

    threads = args.threads or physical_cores()
    torch.set_num_threads(threads)
    config = load_config(args.config, common_settings(args) + [
        f'data.folder="{folder.as_posix()}"', "scheme=\"supervised\"", f"budget.steps={steps}",
        "validation.every_steps=1000000"])
    setup, _, noise = prepare(config, announce=lambda text: None)
    setup.from_trained_weights = False  # the loop's steps, not the one-off held-out selection at the end
    batch_size, patch_size = config["data"]["batch_size"], config["data"]["patch_size"]
    initial = copy.deepcopy(setup.model)
    rng = np.random.default_rng(args.seed)
    batch = to_tensors(setup.scheme.prepare(setup.train.sample(rng, batch_size, patch_size), rng),
                       setup.channels_last)
    measured = setup.config
    warm_up = dict(measured, budget=dict(measured["budget"], steps=min(steps, 20)))
    loop_rates, step_rates, bare_rates = [], [], []
    for round_index in range(-1, rounds):
        round_steps = steps if round_index >= 0 else warm_up["budget"]["steps"]
        setup.model, setup.config = copy.deepcopy(initial), measured if round_index >= 0 else warm_up
        shutil.rmtree(work / f"throughput-{round_index + 1}", ignore_errors=True)  # a previous measurement's
        run = create_run_folder(work / f"throughput-{round_index + 1}", setup.config, noise)
        started = time.perf_counter()
        summary = train(setup, run)
        loop_rate = round_steps * batch_size / (time.perf_counter() - started)

        model = copy.deepcopy(initial)
        if setup.channels_last:
            model.to(memory_format=torch.channels_last)  # the same layout and arithmetic as the loop's
        optimizer = make_optimizer(model, setup.config["optim"])  # the loop's own optimiser and settings
        started = time.perf_counter()
        for _ in range(round_steps):
            optimizer.zero_grad(set_to_none=True)
            with step_precision(setup.precision):
                output = apply_model(model, batch["noisy"], batch.get("level"))
            torch.mean((output - batch["clean"]) ** 2).backward()
            optimizer.step()
        if round_index >= 0:
            loop_rates.append(loop_rate)
            step_rates.append(summary["patches_per_second"])
            bare_rates.append(round_steps * batch_size / (time.perf_counter() - started))
    loop, bare = statistics.median(loop_rates), statistics.median(bare_rates)
    return {"loop_patches_per_second": loop_rates, "loop_step_patches_per_second": step_rates,
            "bare_patches_per_second": bare_rates, "ratio": loop / bare,
            "step_ratio": statistics.median(step_rates) / bare, "threads": threads, "steps": steps,
            "channels_last": setup.channels_last, "precision": setup.precision}


def train_and_score(case: str, scheme: str, made: dict[str, Any], images: dict[str, tuple[np.ndarray, np.ndarray]],
                    record: dict[str, Any], work: Path, args: argparse.Namespace) -> None:
    """Train one scheme of one case, score it (and the state it started from, if trained weights) through the
    runtime, and enter the rows and the training record into ``record``."""
    rows = record["psnr"]
    layout = {"supervised": "clean-only", "noise2noise": "noisy-pairs"}.get(scheme, "noisy-only")
    budget = (f"{args.steps_per_scheme} steps" if getattr(args, "steps_per_scheme", 0)
              else f"{args.minutes_per_scheme} min")
    print(f"-- {scheme} on {layout}, {budget}", flush=True)
    out = work / "runs" / f"{case}-{scheme.replace(' ', '-')}"
    shutil.rmtree(out, ignore_errors=True)
    summary = train_scheme(made["root"] / layout, None if scheme == AS_CONFIGURED else scheme, out,
                           args.minutes_per_scheme, args)
    scores = score_run(out, images, args.threads or 2)
    if (out / "checkpoints" / "start.pt").is_file():  # the start alone, scored the same way
        start = score_run(out, images, args.threads or 2, checkpoint="start")
        rows[starting_label(scheme)] = start["psnr"]["1"]
        rows[starting_label(scheme) + ENSEMBLE_LABEL] = start["psnr"][str(ENSEMBLE)]
    rows[scheme], rows[scheme + ENSEMBLE_LABEL] = scores["psnr"]["1"], scores["psnr"][str(ENSEMBLE)]
    record["training"][scheme] = {key: summary.get(key) for key in (
        "steps", "minutes", "patches_per_second", "gflops_per_second", "stopped", "transform",
        "precision", "scheme", "noise_kind", "noise_decided_by", "transform_decided_by",
        "started_from", "selection")}
    print(f"   {scheme}: {_mean(rows[scheme]):.2f} dB, x{ENSEMBLE} "
          f"{_mean(rows[scheme + ENSEMBLE_LABEL]):.2f} dB after {summary['steps']} steps", flush=True)


def case_schemes(case: str, gaussian_schemes: tuple[str, ...], only: str | None = None) -> tuple[str, ...]:
    """The schemes trained for ``case``: its own list (the Gaussian case: ``--schemes``), kept to those named
    in ``only`` (``--only-schemes``) when given."""
    schemes = tuple(CASES[case].get("schemes", gaussian_schemes))
    if not only:
        return schemes
    from grainwright.trainer.schemes.registry import SCHEMES

    wanted = {name.strip() for name in only.split(",") if name.strip()}
    unknown = sorted(wanted - set(SCHEMES) - {AS_CONFIGURED})
    if unknown:
        raise ConfigError(f"--only-schemes: unknown scheme(s) {', '.join(unknown)}; known: {', '.join(SCHEMES)}")
    return tuple(scheme for scheme in schemes if scheme in wanted)


def run_bench(args: argparse.Namespace) -> int:
    """Run the benchmark; with ``--json``, results are written after every scheme and a rerun with the same
    file skips what is done (so schemes may get different ``--minutes-per-scheme`` in separate runs)."""
    from grainwright.inference.common.atomic import write_json_atomic
    from grainwright.inference.evaluation.metrics import psnr
    from grainwright.models.registry import build_model, hyper_defaults
    from grainwright.trainer.config import load_config

    cases = [case.strip() for case in args.cases.split(",") if case.strip()]
    gaussian_schemes = tuple(s.strip() for s in args.schemes.split(",") if s.strip())
    scored = getattr(args, "train_on_scored", False)
    for case in cases:  # a misspelt case or scheme fails here, before minutes of data and opponent tuning
        if case not in CASES:
            raise ConfigError(f"--cases: unknown case {case!r}; known: {', '.join(CASES)}")
        needing_pairs = [scheme for scheme in case_schemes(case, gaussian_schemes, getattr(args, "only_schemes", None))
                         if scheme in ("supervised", "noise2noise")]
        if scored and needing_pairs:
            raise ConfigError(f"--train-on-scored: {', '.join(needing_pairs)} in case {case} need clean images or "
                              "noisy pairs the scored images do not have; choose noisy-images-only schemes "
                              "(--schemes / --only-schemes)")
    saved = Path(args.json) if args.json else None
    results: dict[str, Any] = json.loads(saved.read_text()) if saved and saved.is_file() else {"cases": {}}
    resolved = load_config(args.config, common_settings(args))
    build_model(resolved["model"]["name"], 1, **{**hyper_defaults(resolved["model"]["name"]),
                                                  **resolved["model"]["hyper"]})  # a bad --set fails here, early
    settings = {"config": args.config, "set": list(args.set or []), "seed": args.seed,
                "model": resolved["model"]["name"], "hyper": resolved["model"]["hyper"],
                "patch_size": resolved["data"]["patch_size"], "batch_size": resolved["data"]["batch_size"],
                "train_images": training_labels(args.half_scale), "test_images": list(TEST_IMAGES)}
    if scored:  # the key only when given, so that earlier results files stay valid for the usual protocol
        settings["train_on_scored"] = True
    if results.get("settings", settings) != settings:
        differing = sorted(key for key in settings.keys() | results["settings"].keys()
                           if settings.get(key) != results["settings"].get(key))
        raise ConfigError(f"{saved}: holds results of other settings (differing: {', '.join(differing)}); "
                          "use another --json")
    results["settings"] = settings
    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="grainwright-bench-train-"))
    work.mkdir(parents=True, exist_ok=True)

    def save() -> None:
        if saved:
            write_json_atomic(saved, results, default=float)

    try:
        for case in cases:
            print(f"== {CASES[case]['label']}", flush=True)
            made = make_folders(work, case, args.seed, settings["train_images"])
            if scored:
                train_on_scored(made)
            images = {name: (made["clean"][name][..., None], made["noisy"][name][..., None]) for name in TEST_IMAGES}
            record = results["cases"].setdefault(case, {"label": CASES[case]["label"], "psnr": {}, "training": {}})
            rows = record["psnr"]
            if opponent_label(case) not in rows:
                table = opponent(case, images)
                rows["noisy"] = {name: psnr(clean, noisy, peak=1.0) for name, (clean, noisy) in images.items()}
                rows[opponent_label(case)] = table["best per image"]["psnr"]
                for method in case_baselines(case):
                    rows[f"{BASELINE_LABELS[method]} (tuned on ground truth)"] = table[method]["psnr"]
                save()
            print(f"   opponent: {_mean(rows[opponent_label(case)]):.2f} dB", flush=True)
            for scheme in case_schemes(case, gaussian_schemes, getattr(args, "only_schemes", None)):
                if scheme in rows:
                    continue
                train_and_score(case, scheme, made, images, record, work, args)
                save()
        if "gaussian" in cases and args.throughput:
            print("== loop vs bare throughput", flush=True)
            results["throughput"] = measure_throughput(work / "gaussian" / "clean-only", work, args)
            save()
    finally:
        if not args.work:
            shutil.rmtree(work, ignore_errors=True)
    results["targets"] = check_targets(results)
    save()
    print(render_report(results))
    return 0


def _mean(row: dict[str, float]) -> float:
    return float(np.mean(list(row.values())))


def check_targets(results: dict[str, Any]) -> list[tuple[str, bool | None, str]]:
    """The issue's targets, met or not, with their figures: each quality target once for the models alone and
    once with the runtime's self-ensemble (when measured)."""
    targets: list[tuple[str, bool | None, str]] = []
    gaussian = results["cases"].get("gaussian", {}).get("psnr", {})
    opponent = gaussian.get(OPPONENT)
    for suffix in ("", ENSEMBLE_LABEL):
        rows = {name: gaussian[name + suffix] for name in SUPERVISED + ("noise2noise",) + SELF_SUPERVISED
                if name + suffix in gaussian}
        supervised = rows.get("supervised")
        if opponent and supervised:
            gap = _mean(supervised) - _mean(opponent)
            targets.append((f"supervised{suffix} >= opponent + 0.5 dB", gap >= 0.5, f"{gap:+.2f} dB"))
        if supervised and "noise2noise" in rows:
            gap = _mean(rows["noise2noise"]) - _mean(supervised)
            targets.append((f"Noise2Noise{suffix} within 0.2 dB of supervised", gap >= -0.2, f"{gap:+.2f} dB"))
        selfsup = {name: _mean(rows[name]) for name in SELF_SUPERVISED if name in rows}
        if supervised and opponent and selfsup:
            name = max(selfsup, key=selfsup.get)
            gap, margin = selfsup[name] - _mean(supervised), selfsup[name] - _mean(opponent)
            targets.append((f"best self-supervised ({name}{suffix}) within 0.5 dB of supervised and above the "
                            "opponent", gap >= -0.5 and margin > 0,
                            f"{gap:+.2f} dB vs supervised, {margin:+.2f} dB vs opponent"))
    speckle = results["cases"].get("speckle-4", {}).get("psnr", {})
    for suffix in ("", ENSEMBLE_LABEL):
        label = opponent_label("speckle-4")
        if label in speckle and AS_CONFIGURED + suffix in speckle:
            gap = _mean(speckle[AS_CONFIGURED + suffix]) - _mean(speckle[label])
            targets.append((f"speckle, 4 looks, {AS_CONFIGURED}{suffix}: within 0.5 dB of the per-image best of "
                            "TV/NLM/wavelet tuned on ground truth", gap >= -0.5, f"{gap:+.2f} dB"))
    targets += finetune_targets(results)
    if "throughput" in results:
        ratio = results["throughput"]["ratio"]
        targets.append(("loop >= 90% of bare forward+backward throughput", ratio >= 0.9, f"{ratio:.1%}"))
    return targets


# Issue 17's margins over the opponent for the noisy-images-only schemes, by case: (x1, x8 self-ensemble), dB.
FINETUNE_MARGINS = {"gaussian": (0.3, 0.4), "poisson-gaussian": (0.2, None), "speckle": (0.2, None)}
# ... and over the start alone (the starting model), where adaptation to the sensor should show.
FINETUNE_OVER_START = {"poisson-gaussian": 0.1, "speckle": 0.1}


def finetune_targets(results: dict[str, Any]) -> list[tuple[str, bool | None, str]]:
    """Fine-tuned runs (those with a row for their start): above the opponent by the case's margin, and never
    below their start (above it by ``FINETUNE_OVER_START`` where given)."""
    targets: list[tuple[str, bool | None, str]] = []
    for case, record in results["cases"].items():
        rows = record["psnr"]
        opponent = rows.get(opponent_label(case))
        for scheme in SELF_SUPERVISED + ("sure",):
            if starting_label(scheme) not in rows or scheme not in rows:
                continue
            for suffix, margin in zip(("", ENSEMBLE_LABEL), FINETUNE_MARGINS.get(case, (None, None))):
                if margin is not None and opponent and scheme + suffix in rows:
                    gap = _mean(rows[scheme + suffix]) - _mean(opponent)
                    targets.append((f"{case}: fine-tuned {scheme}{suffix} >= opponent + {margin} dB", gap >= margin,
                                    f"{gap:+.2f} dB"))
            floor = FINETUNE_OVER_START.get(case, 0.0)
            gap = _mean(rows[scheme]) - _mean(rows[starting_label(scheme)])
            targets.append((f"{case}: fine-tuned {scheme} >= its start alone + {floor} dB", gap >= floor,
                            f"{gap:+.2f} dB"))
    return targets


def render_report(results: dict[str, Any]) -> str:
    """The results as Markdown tables (PSNR in dB on the held-out images, peak 1)."""
    lines = []
    settings = results["settings"]
    hyper = ", ".join(f"{key} {value}" for key, value in settings["hyper"].items())
    lines.append(f"Model: {settings['model']} ({hyper}), patches {settings['patch_size']}, batch "
                 f"{settings['batch_size']} (config {settings['config']}"
                 + "".join(f", {text}" for text in settings["set"]) + f"). Held out: "
                 f"{', '.join(settings['test_images'])}.")
    for case in results["cases"].values():
        lines += ["", f"**{case['label']}** (PSNR, dB)", "",
                  "| Method | " + " | ".join(TEST_IMAGES) + " | mean | minutes | steps |",
                  "|---|" + "---|" * (len(TEST_IMAGES) + 3)]
        for method, row in case["psnr"].items():
            training = case["training"].get(method.removesuffix(ENSEMBLE_LABEL), {})
            minutes = f"{training['minutes']:.1f}" if "minutes" in training else ""
            lines.append(f"| {method} | " + " | ".join(f"{row[name]:.2f}" for name in TEST_IMAGES)
                         + f" | {_mean(row):.2f} | {minutes} | {training.get('steps', '')} |")
    if "throughput" in results:
        t = results["throughput"]
        lines += ["", f"Throughput ({t['threads']} threads, {t['steps']} steps per measurement, alternated): loop "
                  + ", ".join(f"{r:.1f}" for r in t["loop_patches_per_second"]) + " patches/s; bare "
                  + ", ".join(f"{r:.1f}" for r in t["bare_patches_per_second"])
                  + f" patches/s; ratio of medians {t['ratio']:.1%}."]
        if "loop_step_patches_per_second" in t:
            lines[-1] += (" The loop's steps alone (its own timer: no checkpoints or validation) "
                          + ", ".join(f"{r:.1f}" for r in t["loop_step_patches_per_second"])
                          + f" patches/s, {t['step_ratio']:.1%} of bare.")
    lines += ["", "| Target | Met | Figure |", "|---|---|---|"]
    for description, met, figure in results["targets"]:
        lines.append(f"| {description} | {'yes' if met else 'no'} | {figure} |")
    return "\n".join(lines) + "\n"
