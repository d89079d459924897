"""``grainwright bench train``: each training scheme, time-boxed, against classical filters tuned on ground truth.

Data (open data, grayscale): scikit-image's bundled sample images. The networks train on ``TRAIN_IMAGES`` and are
scored on the held-out ``TEST_IMAGES``, which they never see. Noise cases: Gaussian (sigma 25/255, every scheme),
Poisson-Gaussian and gamma speckle (a supervised and a self-supervised scheme each). Noisy images are float32 and
unclipped. Each scheme trains with ``grainwright train`` for ``--minutes-per-scheme`` minutes.

Opponent: for each held-out image, the best PSNR among total-variation denoising (Chambolle), non-local means and
wavelet shrinkage (BayesShrink and VisuShrink) from ``skimage.restoration``, each with a small parameter grid
tuned on that image's ground truth, which no real user has.

Throughput: the training loop (patch sampling, synthetic noise, schedule, logging included) against bare
forward+backward+Adam passes of the same model on tensors made once, alternated twice in the same run.
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

TEST_IMAGES = ("camera", "coins", "moon")
TRAIN_IMAGES = ("brick", "grass", "gravel", "chelsea", "coffee", "rocket", "page", "text", "clock", "cell",
                "immunohistochemistry", "hubble_deep_field")
CASES: dict[str, dict[str, Any]] = {
    "gaussian": {"noise": {"kind": "gaussian", "sigma": 25.0 / 255.0}, "label": "Gaussian, sigma 25/255"},
    "poisson-gaussian": {"noise": {"kind": "poisson-gaussian", "gain": 0.01, "read": 0.02},
                         "label": "Poisson-Gaussian, gain 0.01, read 0.02 (fractions of the range)",
                         "schemes": ("supervised", "recorrupted")},
    "speckle": {"noise": {"kind": "speckle-gamma", "looks": 10.0}, "label": "gamma speckle, 10 looks",
                "schemes": ("supervised", "neighbor2neighbor")},
}
SUPERVISED = ("supervised",)
SELF_SUPERVISED = ("masked", "neighbor2neighbor", "recorrupted")


def sample_image(name: str) -> np.ndarray:
    """A scikit-image sample image as float32 grayscale in [0, 1] (at most 512 x 512, centre crop)."""
    from skimage import data
    from skimage.color import rgb2gray

    image = getattr(data, name)()
    image = rgb2gray(image[..., :3]) if image.ndim == 3 else image.astype(np.float64) / 255.0
    h, w = image.shape
    top, left = max(0, (h - 512) // 2), max(0, (w - 512) // 2)
    return np.ascontiguousarray(image[top:top + 512, left:left + 512], dtype=np.float32)


def make_folders(work: Path, case: str, seed: int) -> dict[str, Any]:
    """Write the training folders of ``case`` (clean-only + noise.toml, noisy-pairs, noisy-only) and return the
    held-out clean and noisy images."""
    from grainwright.inference.noise import noise_from_dict, save_noise

    noise = noise_from_dict(CASES[case]["noise"])
    rng = np.random.default_rng([seed, len(case)])
    root = work / case
    for index, name in enumerate(TRAIN_IMAGES):
        clean = sample_image(name)[..., None]
        for folder, array in (("clean-only/clean", clean), ("noisy-pairs/noisy-a", noise.sample(clean, rng)),
                              ("noisy-pairs/noisy-b", noise.sample(clean, rng)),
                              ("noisy-only/noisy", noise.sample(clean, rng))):
            (root / folder).mkdir(parents=True, exist_ok=True)
            np.save(root / folder / f"{index:02d}-{name}.npy", np.asarray(array, dtype=np.float32))
    save_noise(noise, root / "clean-only" / "noise.toml")
    held_out = {name: sample_image(name) for name in TEST_IMAGES}
    noisy = {name: noise.sample(image[..., None], rng)[..., 0] for name, image in held_out.items()}
    return {"root": root, "clean": held_out, "noisy": noisy}


def classical_opponent(clean: np.ndarray, noisy: np.ndarray) -> dict[str, float]:
    """Best PSNR (dB, peak 1) of TV, NLM and wavelet shrinkage, each over a small grid tuned on ``clean``."""
    from skimage.restoration import denoise_nl_means, denoise_tv_chambolle, denoise_wavelet, estimate_sigma

    from grainwright.inference.metrics import psnr

    sigma = float(estimate_sigma(noisy))
    best: dict[str, float] = {}
    trials = {
        "TV": [lambda w=w: denoise_tv_chambolle(noisy, weight=w) for w in (0.04, 0.06, 0.08, 0.11, 0.15, 0.2)],
        "NLM": [lambda k=k: denoise_nl_means(noisy, h=k * sigma, sigma=sigma, patch_size=5, patch_distance=6,
                                             fast_mode=True) for k in (0.6, 0.8, 1.0, 1.2)],
        "wavelet": [lambda k=k, m=m: denoise_wavelet(noisy, sigma=k * sigma, method=m, mode="soft",
                                                     rescale_sigma=True)
                    for m, scales in (("BayesShrink", (0.75, 1.0, 1.25)), ("VisuShrink", (0.35, 0.5, 0.7)))
                    for k in scales],
    }
    for method, runs in trials.items():
        best[method] = max(psnr(clean, run(), peak=1.0) for run in runs)
    return best


def denoise_with(run_dir: Path, noisy: np.ndarray) -> np.ndarray:
    """Apply a run folder's best checkpoint to a float image, through its normalisation (and transform)."""
    from grainwright.inference.normalization import Normalization
    from grainwright.models.checkpoint import load_checkpoint, model_from_checkpoint

    payload = load_checkpoint(run_dir)
    model = model_from_checkpoint(payload)
    normalization = Normalization.from_dict(payload["normalization"])
    working = normalization.to_working(noisy[..., None])
    with torch.no_grad():
        output = model(torch.from_numpy(working.transpose(2, 0, 1)[None].copy()))[0].numpy()
    return normalization.from_working_float(output.transpose(1, 2, 0))[..., 0]


def train_scheme(folder: Path, scheme: str, out: Path, minutes: float, args: argparse.Namespace) -> dict[str, Any]:
    from grainwright.trainer.run import train_command

    settings = [f"model.hyper.depth={args.depth}", f"model.hyper.width={args.width}",
                f"data.patch_size={args.patch_size}", f"data.batch_size={args.batch_size}",
                f"threads={args.threads}", f"seed={args.seed}", "validation.every_steps=50",
                "validation.patches=32", "validation.patience=0", "logging.progress=false",
                "checkpoint.every_minutes=2"]
    summary, _ = train_command(None, str(folder), scheme=scheme, minutes=minutes, out=str(out),
                               assignments=settings, announce=lambda text: print(f"    {text}", flush=True))
    return summary


def measure_throughput(folder: Path, work: Path, args: argparse.Namespace, steps: int = 30,
                       rounds: int = 3) -> dict[str, Any]:
    """Patches per second of the training loop (supervised, synthetic noise) and of bare forward+backward+Adam
    passes of the same model on one pre-made batch of the same data, alternated ``rounds`` times."""
    import copy

    from grainwright.trainer.config import load_config
    from grainwright.trainer.loop import to_tensors, train
    from grainwright.trainer.run import _create_run_folder, physical_cores, prepare

    threads = args.threads or physical_cores()
    torch.set_num_threads(threads)
    config = load_config(None, [f'data.folder="{folder.as_posix()}"', "scheme=\"supervised\"",
                                f"model.hyper.depth={args.depth}", f"model.hyper.width={args.width}",
                                f"data.patch_size={args.patch_size}", f"data.batch_size={args.batch_size}",
                                f"budget.steps={steps}", "validation.every_steps=1000000", "logging.progress=false",
                                f"seed={args.seed}"])
    setup, _, noise = prepare(config, announce=lambda text: None)
    initial = copy.deepcopy(setup.model)
    rng = np.random.default_rng(args.seed)
    batch = to_tensors(setup.scheme.prepare(setup.train.sample(rng, args.batch_size, args.patch_size), rng),
                       setup.channels_last)
    loop_rates, bare_rates = [], []
    for round_index in range(rounds):
        setup.model = copy.deepcopy(initial)
        run = _create_run_folder(work / f"throughput-{round_index}", setup.config, noise)
        started = time.perf_counter()
        train(setup, run)
        loop_rates.append(steps * args.batch_size / (time.perf_counter() - started))

        model = copy.deepcopy(initial)
        if setup.channels_last:
            model.to(memory_format=torch.channels_last)  # the same layout as the loop's
        optimizer = torch.optim.Adam(model.parameters(), lr=1e-3)
        started = time.perf_counter()
        for _ in range(steps):
            optimizer.zero_grad(set_to_none=True)
            torch.mean((model(batch["noisy"]) - batch["clean"]) ** 2).backward()
            optimizer.step()
        bare_rates.append(steps * args.batch_size / (time.perf_counter() - started))
    loop, bare = statistics.median(loop_rates), statistics.median(bare_rates)
    return {"loop_patches_per_second": loop_rates, "bare_patches_per_second": bare_rates,
            "ratio": loop / bare, "threads": threads, "steps": steps, "channels_last": setup.channels_last}


def run_bench(args: argparse.Namespace) -> int:
    from grainwright.inference.metrics import psnr

    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="grainwright-bench-train-"))
    work.mkdir(parents=True, exist_ok=True)
    cases = [case.strip() for case in args.cases.split(",") if case.strip()]
    gaussian_schemes = tuple(s.strip() for s in args.schemes.split(",") if s.strip())
    results: dict[str, Any] = {"settings": {"minutes_per_scheme": args.minutes_per_scheme, "depth": args.depth,
                                            "width": args.width, "patch_size": args.patch_size,
                                            "batch_size": args.batch_size, "seed": args.seed,
                                            "train_images": TRAIN_IMAGES, "test_images": TEST_IMAGES},
                               "cases": {}}
    try:
        for case in cases:
            print(f"== {CASES[case]['label']}", flush=True)
            made = make_folders(work, case, args.seed)
            opponent = {name: classical_opponent(made["clean"][name], made["noisy"][name]) for name in TEST_IMAGES}
            rows: dict[str, Any] = {
                "noisy": {name: psnr(made["clean"][name], made["noisy"][name], peak=1.0) for name in TEST_IMAGES},
                "opponent (best of TV/NLM/wavelet, tuned on ground truth)":
                    {name: max(best.values()) for name, best in opponent.items()},
            }
            for method in ("TV", "NLM", "wavelet"):
                rows[f"{method} (tuned on ground truth)"] = {name: opponent[name][method] for name in TEST_IMAGES}
            print(f"   opponent: {np.mean(list(rows['opponent (best of TV/NLM/wavelet, tuned on ground truth)'].values())):.2f} dB", flush=True)
            summaries = {}
            for scheme in CASES[case].get("schemes", gaussian_schemes):
                layout = {"supervised": "clean-only", "noise2noise": "noisy-pairs"}.get(scheme, "noisy-only")
                print(f"-- {scheme} on {layout}, {args.minutes_per_scheme} min", flush=True)
                out = work / "runs" / f"{case}-{scheme}"
                shutil.rmtree(out, ignore_errors=True)
                summary = train_scheme(made["root"] / layout, scheme, out, args.minutes_per_scheme, args)
                rows[scheme] = {name: psnr(made["clean"][name], denoise_with(out, made["noisy"][name]), peak=1.0)
                                for name in TEST_IMAGES}
                summaries[scheme] = {key: summary[key] for key in ("steps", "minutes", "patches_per_second",
                                                                   "gflops_per_second", "stopped", "transform")}
                print(f"   {scheme}: {np.mean(list(rows[scheme].values())):.2f} dB after {summary['steps']} steps",
                      flush=True)
            results["cases"][case] = {"label": CASES[case]["label"], "psnr": rows, "training": summaries}
        if "gaussian" in cases:
            print("== loop vs bare throughput", flush=True)
            results["throughput"] = measure_throughput(work / "gaussian" / "clean-only", work, args)
    finally:
        if not args.work:
            shutil.rmtree(work, ignore_errors=True)
    results["targets"] = check_targets(results)
    report = render_report(results)
    print(report)
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=2, default=float) + "\n", encoding="utf-8")
    return 0


def _mean(row: dict[str, float]) -> float:
    return float(np.mean(list(row.values())))


def check_targets(results: dict[str, Any]) -> list[tuple[str, bool | None, str]]:
    """The issue's targets: (description, met or None when not measured, figures)."""
    targets: list[tuple[str, bool | None, str]] = []
    gaussian = results["cases"].get("gaussian", {}).get("psnr", {})
    opponent = gaussian.get("opponent (best of TV/NLM/wavelet, tuned on ground truth)")
    supervised = gaussian.get("supervised")
    if opponent and supervised:
        gap = _mean(supervised) - _mean(opponent)
        targets.append(("supervised >= opponent + 0.5 dB", gap >= 0.5, f"{gap:+.2f} dB"))
    if supervised and "noise2noise" in gaussian:
        gap = _mean(gaussian["noise2noise"]) - _mean(supervised)
        targets.append(("Noise2Noise within 0.2 dB of supervised", gap >= -0.2, f"{gap:+.2f} dB"))
    selfsup = {name: _mean(gaussian[name]) for name in SELF_SUPERVISED if name in gaussian}
    if supervised and opponent and selfsup:
        name = max(selfsup, key=selfsup.get)
        gap, margin = selfsup[name] - _mean(supervised), selfsup[name] - _mean(opponent)
        targets.append((f"best self-supervised ({name}) within 0.5 dB of supervised and above the opponent",
                        gap >= -0.5 and margin > 0, f"{gap:+.2f} dB vs supervised, {margin:+.2f} dB vs opponent"))
    if "throughput" in results:
        ratio = results["throughput"]["ratio"]
        targets.append(("loop >= 90% of bare forward+backward throughput", ratio >= 0.9, f"{ratio:.1%}"))
    return targets


def render_report(results: dict[str, Any]) -> str:
    """The results as Markdown tables (PSNR in dB on the held-out images, peak 1)."""
    lines = []
    settings = results["settings"]
    lines.append(f"Model: residual {settings['depth']} x {settings['width']}, patches {settings['patch_size']}, "
                 f"batch {settings['batch_size']}, {settings['minutes_per_scheme']} min per scheme. Held out: "
                 f"{', '.join(settings['test_images'])}.")
    for case in results["cases"].values():
        lines += ["", f"**{case['label']}** (PSNR, dB)", "",
                  "| Method | " + " | ".join(TEST_IMAGES) + " | mean | steps |",
                  "|---|" + "---|" * (len(TEST_IMAGES) + 2)]
        for method, row in case["psnr"].items():
            steps = case["training"].get(method, {}).get("steps", "")
            lines.append(f"| {method} | " + " | ".join(f"{row[name]:.2f}" for name in TEST_IMAGES)
                         + f" | {_mean(row):.2f} | {steps} |")
    if "throughput" in results:
        t = results["throughput"]
        lines += ["", f"Throughput ({t['threads']} threads, {t['steps']} steps per measurement, alternated): loop "
                  + ", ".join(f"{r:.1f}" for r in t["loop_patches_per_second"]) + " patches/s; bare "
                  + ", ".join(f"{r:.1f}" for r in t["bare_patches_per_second"])
                  + f" patches/s; ratio of medians {t['ratio']:.1%}."]
    lines += ["", "| Target | Met | Figure |", "|---|---|---|"]
    for description, met, figure in results["targets"]:
        lines.append(f"| {description} | {'yes' if met else 'no'} | {figure} |")
    return "\n".join(lines) + "\n"
