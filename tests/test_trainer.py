"""Training runs end to end: run folders, seeding, exact resume, bad input, the command line.

Open data: crops of scikit-image's bundled ``camera`` image. Every run is tiny (a few tens of steps, a 4-layer
model) and uses one thread.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
import torch
from skimage import data

from grainwright.console.cli import main
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.images.imageio import write_image
from grainwright.models.checkpoint import load_checkpoint
from grainwright.trainer.run import train_command

TINY = ["model.hyper.depth=4", "model.hyper.width=12", "data.patch_size=32", "data.batch_size=8", "threads=1",
        "validation.every_steps=10", "validation.patches=16", "logging.progress=false", "logging.tensorboard=false",
        "model.channels_last=false", "model.precision=\"float32\""]
# The shipped configs' U-Net, made tiny.
TINY_UNET = ["model.hyper.width=8"] + [a for a in TINY if not a.startswith("model.hyper.")]
SIGMA = 25.0  # 8-bit units


def _crops(count: int = 4, size: int = 96) -> list[np.ndarray]:
    camera = data.camera()
    return [camera[64 + 96 * i:64 + 96 * i + size, 100 + 60 * i:100 + 60 * i + size] for i in range(count)]


def _noisy(clean: np.ndarray, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.clip(np.round(clean + rng.normal(0, SIGMA, clean.shape)), 0, 255).astype(np.uint8)


def _clean_folder(root):
    for i, crop in enumerate(_crops()):
        (root / "clean").mkdir(parents=True, exist_ok=True)
        write_image(root / "clean" / f"crop{i}.png", crop)
    (root / "noise.toml").write_text(f'kind = "gaussian"\nsigma_native = {SIGMA}\nrange_native = 255\n')
    return root


def _noisy_folder(root, pairs: bool = False):
    for i, crop in enumerate(_crops()):
        if pairs:
            for folder, seed in (("noisy-a", i), ("noisy-b", 100 + i)):
                (root / folder).mkdir(parents=True, exist_ok=True)
                write_image(root / folder / f"crop{i}.png", _noisy(crop, seed))
        else:
            (root / "noisy").mkdir(parents=True, exist_ok=True)
            write_image(root / "noisy" / f"crop{i}.png", _noisy(crop, i))
    return root


def _weights(run) -> dict[str, torch.Tensor]:
    return load_checkpoint(run.last)["state_dict"]


def _quiet(message: str) -> None:
    pass


@pytest.mark.slow
def test_supervised_run_writes_the_run_folder_and_denoises(tmp_path):
    folder = _clean_folder(tmp_path / "data")
    summary, run = train_command(None, str(folder), steps=60, out=str(tmp_path / "run"), announce=_quiet,
                                 assignments=TINY + ["logging.tensorboard=true"])
    assert summary["scheme"] == "supervised" and summary["layout"] == "clean-only"
    for path in (run.config, run.noise, run.summary, run.last, run.best):
        assert path.is_file(), path
    assert list((run.root / "tensorboard").glob("events.out.tfevents.*"))
    best = load_checkpoint(run.best)
    assert best["scheme"] == "supervised" and best["architecture"] == "residual"
    assert best["noise"] == {"kind": "gaussian", "sigma": pytest.approx(SIGMA / 255)}
    written = json.loads(run.summary.read_text())
    assert written["steps"] == 60 and written["stopped"] == "budget"
    # PSNR of the noisy input is 20 log10(255 / 25) = 20.2 dB (definition of PSNR); training must improve on it.
    input_psnr = 20 * math.log10(255 / SIGMA)
    assert written["best_validation"]["psnr"] > input_psnr + 2.0


@pytest.mark.slow
def test_same_seed_gives_the_same_weights(tmp_path):
    folder = _noisy_folder(tmp_path / "data")
    outcomes = [train_command(None, str(folder), scheme="neighbor2neighbor", steps=12, out=str(tmp_path / f"run{i}"),
                              announce=_quiet, assignments=TINY) for i in range(2)]
    runs = [run for _, run in outcomes]
    assert [entry["step"] for entry in outcomes[0][0]["validation_history"]] == [10, 12]  # the final state too
    first, second = (_weights(run) for run in runs)
    assert all(torch.equal(first[key], second[key]) for key in first)
    other = train_command(None, str(folder), scheme="neighbor2neighbor", steps=12, out=str(tmp_path / "run-seed"),
                          announce=_quiet, assignments=TINY + ["seed=1"])[1]
    assert not all(torch.equal(first[key], _weights(other)[key]) for key in first)


@pytest.mark.slow
def test_a_completed_budget_keeps_its_final_state_as_best_unless_told_otherwise(tmp_path):
    folder = _clean_folder(tmp_path / "data")
    # A learning rate too high to keep improving makes the validations disagree with the final state.
    settings = TINY + ["optim.lr=0.05", "optim.warmup_fraction=0", "validation.every_steps=5"]
    kept, run = train_command(None, str(folder), steps=30, out=str(tmp_path / "kept"), announce=_quiet,
                              assignments=settings)
    assert kept["best_step"] == 30
    assert kept["best_validation"]["psnr"] == kept["validation_history"][-1]["psnr"]
    best, last = load_checkpoint(run.best)["state_dict"], _weights(run)
    assert all(torch.equal(best[key], last[key]) for key in best)
    competing, run = train_command(None, str(folder), steps=30, out=str(tmp_path / "competing"), announce=_quiet,
                                   assignments=settings + ["validation.keep_final=false"])
    scores = [entry["psnr"] for entry in competing["validation_history"]]
    assert competing["best_validation"]["psnr"] == max(scores) and competing["best_step"] != 30
    assert competing["best_step"] == competing["validation_history"][scores.index(max(scores))]["step"]


@pytest.mark.slow
def test_region_split_holds_out_a_strip_of_every_image(tmp_path):
    folder = _noisy_folder(tmp_path / "data")
    summary, _ = train_command(None, str(folder), scheme="neighbor2neighbor", steps=2, out=str(tmp_path / "run"),
                               announce=_quiet, assignments=TINY + ["data.validation_split=\"regions\""])
    assert summary["training_images"] == 4 and summary["validation_images"] == 4
    summary, _ = train_command(None, str(folder), scheme="neighbor2neighbor", steps=2, out=str(tmp_path / "whole"),
                               announce=_quiet, assignments=TINY)
    assert summary["training_images"] == 3 and summary["validation_images"] == 1


def test_focus_frames_are_announced_recorded_and_a_pattern_matching_nothing_is_refused(tmp_path):
    folder = _noisy_folder(tmp_path / "data")
    said = []
    train_command(None, str(folder), scheme="neighbor2neighbor", steps=2, out=str(tmp_path / "run"),
                  announce=said.append, assignments=TINY + ['data.focus_frames="crop[01].png"', "data.focus_share=0.7"])
    assert any("2 file(s) matching 'crop[01].png' get 70% of the training patches" in line for line in said), said
    assert 'focus_frames = "crop[01].png"' in (tmp_path / "run" / "config.toml").read_text()
    with pytest.raises(ConfigError, match=r"data.focus_frames: no training file in .*data matches 'line3-\*'"):
        train_command(None, str(folder), scheme="neighbor2neighbor", steps=2, out=str(tmp_path / "refused"),
                      announce=_quiet, assignments=TINY + ['data.focus_frames="line3-*"'])
    assert not (tmp_path / "refused").exists()
    # Split by whole images (seed 0 holds out crop2): a focus file held out entirely is said, not silently ignored.
    said = []
    train_command(None, str(folder), scheme="neighbor2neighbor", steps=2, out=str(tmp_path / "held"),
                  announce=said.append, assignments=TINY + ['data.focus_frames="crop2.png"'])
    assert any("every file matching data.focus_frames was held out for validation" in line for line in said), said


@pytest.mark.slow
def test_a_supervised_model_of_poisson_gaussian_noise_denoises_at_run_time(tmp_path):
    """Clean/noisy pairs with signal-dependent noise, a noise-map model, the runtime's defaults. A level map computed
    on the clean patches leaked the target in training (validation 32.4 dB at 1,000 steps here) and left the model
    lost on real input: +1.2 dB over the noisy images at run time, in the mean of the four. With the map of the
    noisy input, in training and by default at run time: measured +7.2 dB."""
    from grainwright.inference.evaluation.metrics import psnr
    from grainwright.inference.images.imageio import read_image
    from grainwright.inference.noise.models import noise_from_dict
    from grainwright.inference.runtime.runner import OnnxDenoiser
    from grainwright.models.export import export_checkpoint

    noise = noise_from_dict({"kind": "poisson-gaussian", "gain": 0.02, "read": 0.02})
    rng = np.random.default_rng(0)
    folder = tmp_path / "data"
    for i, crop in enumerate(_crops()):
        noisy = noise.sample(crop[None, :, :, None] / 255.0, rng)[0]
        for role, image in (("clean", crop[..., None]), ("noisy", np.clip(np.rint(noisy * 255), 0, 255))):
            (folder / role).mkdir(parents=True, exist_ok=True)
            write_image(folder / role / f"crop{i}.png", image.astype(np.uint8))
    (folder / "noise.toml").write_text('kind = "poisson-gaussian"\ngain = 0.02\nread = 0.02\n')
    summary, run = train_command("pairs", str(folder), steps=1000, out=str(tmp_path / "run"), announce=_quiet,
                                 assignments=TINY_UNET + ['start.weights="random"'])
    assert summary["scheme"] == "supervised"
    export_checkpoint(run.best, tmp_path / "model.onnx", threads=1)
    denoiser = OnnxDenoiser(tmp_path / "model.onnx", threads=1)
    assert denoiser.noise_sigma == "model"
    assert denoiser.metadata["noise_map"]["source"] == "noise-model"
    gains = []
    for i in range(4):
        clean, noisy = (read_image(folder / role / f"crop{i}.png") for role in ("clean", "noisy"))
        output = denoiser.run(noisy)
        gains.append(psnr(clean.astype(np.float64), output.astype(np.float64), peak=255.0)
                     - psnr(clean.astype(np.float64), noisy.astype(np.float64), peak=255.0))
    assert np.mean(gains) > 4.0, gains


def test_resume_continues_exactly(tmp_path):
    folder = _noisy_folder(tmp_path / "data")
    settings = TINY + ["model.channels_last=true"]
    straight = train_command(None, str(folder), scheme="recorrupted", steps=24, out=str(tmp_path / "straight"),
                             announce=_quiet, assignments=settings)[1]
    summary, halted = train_command(None, str(folder), scheme="recorrupted", steps=24, out=str(tmp_path / "halted"),
                                    announce=_quiet, assignments=settings, interrupt_at_step=12)
    assert summary["stopped"] == "interrupted" and load_checkpoint(halted.last)["step"] == 12
    summary, resumed = train_command(None, None, resume=str(halted.root), announce=_quiet)
    assert summary["steps"] == 24
    expected, got = _weights(straight), _weights(resumed)
    assert all(torch.equal(expected[key], got[key]) for key in expected)


@pytest.mark.slow
def test_bfloat16_steps_train_reproducibly_and_resume_exactly(tmp_path):
    folder = _clean_folder(tmp_path / "data")
    settings = TINY + ["model.precision=\"bfloat16\""]
    first = train_command(None, str(folder), steps=60, out=str(tmp_path / "a"), announce=_quiet,
                          assignments=settings)
    second = train_command(None, str(folder), steps=60, out=str(tmp_path / "b"), announce=_quiet,
                           assignments=settings)
    weights = [_weights(run) for _, run in (first, second)]
    assert all(torch.equal(weights[0][key], weights[1][key]) for key in weights[0])
    assert all(value.dtype == torch.float32 for value in weights[0].values())  # float32 master weights
    # Definition of PSNR: noisy input at sigma 25 of 255 is 20.2 dB; bfloat16 steps must still learn.
    assert first[0]["best_validation"]["psnr"] > 20 * math.log10(255 / SIGMA) + 2.0
    _, halted = train_command(None, str(folder), steps=60, out=str(tmp_path / "halted"), announce=_quiet,
                              assignments=settings, interrupt_at_step=30)
    _, resumed = train_command(None, None, resume=str(halted.root), announce=_quiet)
    got = _weights(resumed)
    assert all(torch.equal(weights[0][key], got[key]) for key in got)


def test_step_arithmetic_is_chosen_by_measurement():
    from grainwright.models.registry import build_model
    from grainwright.trainer.loop import fastest_step

    model = build_model("residual", 1, depth=3, width=8)
    before = {key: value.clone() for key, value in model.state_dict().items()}
    choice, seconds = fastest_step(model, 1, 16, 2, repeats=1)
    assert set(seconds) == {(False, "float32"), (False, "bfloat16"), (True, "float32"), (True, "bfloat16")}
    assert choice == min(seconds, key=seconds.get) and all(value > 0 for value in seconds.values())
    assert all(torch.equal(before[key], value) for key, value in model.state_dict().items())  # copies only
    assert all(value.is_contiguous() for value in model.parameters())  # the original keeps its layout


@pytest.mark.slow
def test_noise2noise_on_pairs_and_masked_without_skip(tmp_path):
    pairs = _noisy_folder(tmp_path / "pairs", pairs=True)
    summary, _ = train_command(None, str(pairs), steps=10, out=str(tmp_path / "n2n"), announce=_quiet,
                               assignments=TINY)
    assert summary["scheme"] == "noise2noise" and summary["layout"] == "noisy-pairs"
    single = _noisy_folder(tmp_path / "single")
    summary, run = train_command(None, str(single), scheme="masked", steps=10, out=str(tmp_path / "masked"),
                                 announce=_quiet, assignments=TINY)
    assert load_checkpoint(run.best)["hyper"]["skip"] is False
    with pytest.raises(ConfigError, match="model.skip = true"):
        train_command(None, str(single), scheme="masked", steps=10, out=str(tmp_path / "no"), announce=_quiet,
                      assignments=TINY + ["model.skip=true"])
    assert not (tmp_path / "no").exists()


def test_bad_input_stops_before_anything_is_written(tmp_path):
    (tmp_path / "empty").mkdir()
    with pytest.raises(InputError, match="no images found"):
        train_command(None, str(tmp_path / "empty"), steps=5, out=str(tmp_path / "run"), announce=_quiet)
    single = _noisy_folder(tmp_path / "single")
    with pytest.raises(ConfigError, match="holds single noisy images"):
        train_command(None, str(single), scheme="noise2noise", steps=5, out=str(tmp_path / "run"), announce=_quiet)
    with pytest.raises(ConfigError, match="data.patch_size"):
        train_command(None, str(single), scheme="neighbor2neighbor", steps=5, out=str(tmp_path / "run"),
                      announce=_quiet, assignments=TINY + ["data.patch_size=33"])
    assert not (tmp_path / "run").exists()
    assert not [path for path in tmp_path.iterdir() if path.name.startswith(".run")]


@pytest.mark.slow
def test_command_line(tmp_path, capsys):
    folder = _noisy_folder(tmp_path / "data")
    args = ["train", "fast-cpu", "--data", str(folder), "--steps", "5", "--out", str(tmp_path / "run")]
    # fast-cpu ships a U-Net; keep its shape and make it tiny.
    for assignment in ["model.hyper.width=8"] + [a for a in TINY if not a.startswith("model.hyper.")]:
        args += ["--set", assignment]
    assert main(args) == 0
    out = capsys.readouterr().out
    assert "scheme auto: found single noisy images" in out and "trained recorrupted for 5 steps" in out
    assert main(args) == 2  # the run folder exists now
    assert "exists and is not empty" in capsys.readouterr().err
    assert main(["train", "--data", str(folder), "--scheme", "noise2noise", "--out", str(tmp_path / "x")]) == 2
    assert "schemes that fit" in capsys.readouterr().err


def test_learning_rate_follows_warm_up_then_cosine():
    # Reference: torch.optim.lr_scheduler.CosineAnnealingLR (Loshchilov and Hutter 2017's cosine annealing) over
    # the steps after the warm-up; the warm-up itself is linear from zero.
    from grainwright.trainer.config import defaults
    from grainwright.trainer.loop import learning_rate

    optim = dict(defaults()["optim"], lr=2e-3, warmup_fraction=0.1, final_lr_fraction=0.05)
    total, warm = 200, 20
    assert learning_rate(0.0, optim) == 0.0
    assert learning_rate(10 / total, optim) == pytest.approx(1e-3)
    parameter = torch.nn.Parameter(torch.zeros(1))
    optimizer = torch.optim.SGD([parameter], lr=2e-3)
    reference = torch.optim.lr_scheduler.CosineAnnealingLR(optimizer, T_max=total - warm, eta_min=1e-4)
    for step in range(warm, total + 1):
        assert learning_rate(step / total, optim) == pytest.approx(optimizer.param_groups[0]["lr"], rel=1e-6)
        optimizer.step()
        reference.step()


@pytest.mark.slow
def test_poisson_gaussian_recorrupted_trains_in_the_anscombe_domain(tmp_path):
    rng = np.random.default_rng(0)
    gain, read = 0.01, 0.01  # working units: fractions of the 12-bit range
    (tmp_path / "data" / "noisy").mkdir(parents=True)
    for i, crop in enumerate(_crops()):
        clean = crop.astype(np.float64) / 255.0
        noisy = gain * rng.poisson(clean / gain) + read * rng.standard_normal(clean.shape)
        write_image(tmp_path / "data" / "noisy" / f"crop{i}.tif", np.clip(np.round(noisy * 4095), 0, 4095).astype(np.uint16))
    (tmp_path / "data" / "noise.toml").write_text(f'kind = "poisson-gaussian"\ngain = {gain}\nread = {read}\n')
    summary, run = train_command(None, str(tmp_path / "data"), steps=10, out=str(tmp_path / "run"), announce=_quiet,
                                 assignments=TINY + ["data.bit_depth=12"])
    assert summary["scheme"] == "recorrupted" and summary["transform"] == "anscombe"
    transform = load_checkpoint(run.best)["normalization"]["transform"]
    assert transform["kind"] == "anscombe" and transform["gain"] == pytest.approx(gain)


@pytest.mark.slow
def test_banding_is_flagged_and_corrected(tmp_path):
    rng = np.random.default_rng(1)
    lines: list[str] = []
    (tmp_path / "data" / "noisy").mkdir(parents=True)
    for i, crop in enumerate(_crops()):
        rows = rng.normal(0, 12.0, (crop.shape[0], 1))  # strong row banding, 8-bit units
        noisy = crop + rng.normal(0, 10.0, crop.shape) + rows
        np.save(tmp_path / "data" / "noisy" / f"crop{i}.npy", noisy.astype(np.float32))
    summary, _ = train_command(None, str(tmp_path / "data"), scheme="neighbor2neighbor", steps=4,
                               out=str(tmp_path / "run"), announce=lines.append, assignments=TINY)
    assert summary["fixed_pattern_corrected"] is True
    assert any("banding" in line and "fixed-pattern correction" in line for line in lines)


@pytest.mark.slow
def test_sigterm_saves_a_resumable_state(tmp_path):
    import signal
    import subprocess
    import sys
    import time

    folder = _noisy_folder(tmp_path / "data")
    run_dir = tmp_path / "run"
    command = ["train", "--data", str(folder), "--steps", "100000", "--out", str(run_dir),
               "--set", "checkpoint.every_minutes=100"]
    for assignment in TINY:
        command += ["--set", assignment]
    script = f"import sys\nfrom grainwright.console.cli import main\nsys.exit(main({command!r}))\n"
    process = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 60
    while not (run_dir / "checkpoints" / "last.pt").exists() and time.monotonic() < deadline:
        time.sleep(0.2)  # last.pt is written just before the first step
    time.sleep(1.0)
    process.send_signal(signal.SIGTERM)
    assert process.wait(timeout=60) == 130
    written = json.loads((run_dir / "training-summary.json").read_text())
    assert written["stopped"] == "interrupted"
    assert load_checkpoint(run_dir / "checkpoints" / "last.pt")["step"] == written["steps"] > 0


@pytest.mark.slow
def test_sure_scheme_trains_on_single_noisy_images(tmp_path):
    folder = _noisy_folder(tmp_path / "data")
    (folder / "noise.toml").write_text(f'kind = "gaussian"\nsigma_native = {SIGMA}\nrange_native = 255\n')
    summary, run = train_command(None, str(folder), scheme="sure", steps=12, out=str(tmp_path / "run"),
                                 announce=_quiet, assignments=TINY)
    assert summary["scheme"] == "sure" and summary["steps"] == 12 and run.best.exists()
    assert math.isfinite(summary["best_validation"]["loss"])


def _scenario_folder(root, noise: str, size: int = 256, count: int = 4):
    """Single noisy 16-bit frames of our procedural inspection scene (wide signal range, flat areas), with no
    noise description: gamma speckle of 4 looks, or Poisson-Gaussian noise (gain 0.01, read 0.005 of the range)."""
    from grainwright.inference.synthetic.scenario import render_clean

    rng = np.random.default_rng(7)
    (root / "noisy").mkdir(parents=True)
    for i in range(count):
        clean = np.clip(render_clean(size, size, i)[0] / 4095.0, 0.0, 1.0)
        if noise == "speckle":
            noisy = (0.02 + 0.9 * clean) * rng.gamma(4.0, 1.0 / 4.0, clean.shape) * 0.5
        else:
            noisy = 0.01 * rng.poisson(clean / 0.01) + 0.005 * rng.standard_normal(clean.shape)
        write_image(root / "noisy" / f"frame{i}.tif", np.clip(np.round(noisy * 65535), 0, 65535).astype(np.uint16))
    return root


@pytest.mark.slow
def test_a_speckle_noise_description_leads_auto_to_neighbor2neighbor_and_recorrupted_to_a_caution(tmp_path):
    # Recorrupted-to-Recorrupted (Pang et al. 2021) assumes Gaussian noise in the working domain; the log of gamma
    # speckle is skewed (its mean is psi(L) - ln L, its distribution log-gamma), so a given description of speckle
    # is handled as the same speckle found by the analysis is.
    from grainwright.inference.noise.models import GammaSpeckle, save_noise

    folder = _scenario_folder(tmp_path / "data", "speckle")
    save_noise(GammaSpeckle(looks=4.0), folder / "noise.toml")
    lines: list[str] = []
    summary, _ = train_command("noisy-only", str(folder), steps=2, out=str(tmp_path / "auto"), announce=lines.append,
                               assignments=TINY_UNET)
    assert summary["scheme"] == "neighbor2neighbor"
    assert any(line.startswith("scheme auto:") and "speckle-gamma noise" in line and "not Gaussian" in line
               for line in lines)
    lines.clear()
    summary, _ = train_command("noisy-only", str(folder), scheme="recorrupted", steps=2, out=str(tmp_path / "asked"),
                               announce=lines.append, assignments=TINY_UNET)
    assert summary["scheme"] == "recorrupted"  # asked for by name: it trains, with the caution
    assert any(line.startswith("caution: scheme 'recorrupted'") for line in lines)


@pytest.mark.slow
def test_noisy_only_config_on_speckle_trains_in_the_log_domain_with_the_bias_removed(tmp_path):
    from scipy.special import digamma

    folder = _scenario_folder(tmp_path / "data", "speckle")
    lines: list[str] = []
    summary, run = train_command("noisy-only", str(folder), steps=4, out=str(tmp_path / "run"),
                                 announce=lines.append, assignments=TINY_UNET)
    assert summary["noise_kind"] == "speckle-gamma" and summary["noise_decided_by"] == "analysis of the training images"
    assert summary["transform"] == "log" and summary["transform_decided_by"] == "analysis of the training images"
    assert summary["scheme"] == "neighbor2neighbor"
    assert any(line.startswith("scheme auto:") and "speckle-gamma" in line for line in lines)
    assert ("noise speckle-gamma (from the analysis of the training images), transform log (decided by the analysis "
            "of the training images)") in lines[-1]
    transform = load_checkpoint(run.best)["normalization"]["transform"]
    looks = transform["looks"]
    assert 3.0 < looks < 5.0  # 4 looks simulated
    # Reference for psi: scipy.special.digamma.
    assert transform["bias"] == pytest.approx(float(digamma(looks)) - math.log(looks), rel=1e-9)


@pytest.mark.slow
def test_noisy_only_config_on_poisson_gaussian_trains_recorrupted_in_the_anscombe_domain(tmp_path):
    folder = _scenario_folder(tmp_path / "data", "poisson-gaussian")
    summary, run = train_command("noisy-only", str(folder), steps=4, out=str(tmp_path / "run"), announce=_quiet,
                                 assignments=TINY_UNET)
    assert summary["noise_kind"] == "poisson-gaussian" and summary["scheme"] == "recorrupted"
    assert summary["transform"] == "anscombe" and summary["transform_decided_by"] == "analysis of the training images"
    transform = load_checkpoint(run.best)["normalization"]["transform"]
    assert transform["kind"] == "anscombe" and transform["gain"] == pytest.approx(0.01, rel=0.25)


@pytest.mark.slow
def test_noisy_only_config_on_gaussian_noise_trains_recorrupted_in_the_linear_range(tmp_path):
    folder = _noisy_folder(tmp_path / "data")  # 8-bit camera crops with Gaussian noise of 25 levels
    summary, run = train_command("noisy-only", str(folder), steps=4, out=str(tmp_path / "run"), announce=_quiet,
                                 assignments=TINY_UNET)
    assert summary["noise_kind"] == "gaussian" and summary["scheme"] == "recorrupted"
    assert summary["transform"] == "none" and summary["transform_decided_by"] == "analysis of the training images"
    assert load_checkpoint(run.best)["noise"]["sigma"] == pytest.approx(SIGMA / 255, rel=0.15)


def test_recorrupted_on_an_uncertain_fit_stops_with_one_line_and_writes_nothing(tmp_path):
    folder = _scenario_folder(tmp_path / "data", "speckle")
    with pytest.raises(ConfigError) as caught:
        train_command("noisy-only", str(folder), scheme="recorrupted", steps=4, out=str(tmp_path / "run"),
                      announce=_quiet, assignments=TINY_UNET)
    message = str(caught.value)
    assert "\n" not in message
    assert "scheme 'recorrupted' needs a noise model it can trust" in message and "speckle-gamma" in message
    assert "--scheme neighbor2neighbor" in message and "noise.toml" in message
    assert not (tmp_path / "run").exists()


def test_impulses_on_some_images_do_not_split_the_vote_on_the_noise_kind():
    """Two speckle images, two speckle images with impulses and three Gaussian ones: speckle is the majority."""
    from types import SimpleNamespace

    from grainwright.inference.noise.analysis import summarise_noise
    from grainwright.inference.noise.models import GammaSpeckle, GaussianNoise

    def analysis(kind, model):
        flag = SimpleNamespace(flagged="impulse" in kind)
        return SimpleNamespace(kind=kind, model=model, confident=False, sigma=[100.0], low=0.0, high=4095.0,
                               impulse=flag, banding=SimpleNamespace(flagged=False),
                               correlation=SimpleNamespace(flagged=False), signal_dependent=True)

    analyses = ([analysis("speckle-gamma", GammaSpeckle(looks=4.0))] * 2
                + [analysis("speckle-gamma+impulse", SimpleNamespace(components=[GammaSpeckle(looks=3.0)]))] * 2
                + [analysis("gaussian", GaussianNoise(sigma=0.02))] * 3)
    found = summarise_noise(analyses)
    assert found.kind == "speckle-gamma" and found.transform == "log" and found.kind_images == 4
    assert found.model.looks == pytest.approx(3.5) and found.flags["impulse"] == 2


@pytest.mark.parametrize("option, value", [("--minutes", "0"), ("--steps", "0"), ("--minutes", "-1"),
                                           ("--steps", "-3")])
def test_zero_or_negative_budgets_are_refused_with_one_line(tmp_path, capsys, option, value):
    folder = _noisy_folder(tmp_path / "data")
    assert main(["train", "--data", str(folder), option, value, "--out", str(tmp_path / "run")]) == 2
    error = capsys.readouterr().err.strip()
    assert len(error.splitlines()) == 1 and f"{option} must be a positive number" in error
    assert not (tmp_path / "run").exists()
    with pytest.raises(ConfigError, match="both budget.steps and budget.minutes are 0"):
        train_command(None, str(folder), out=str(tmp_path / "run"), announce=_quiet,
                      assignments=["budget.steps=0", "budget.minutes=0"])


class _Killed(BaseException):
    """Stands in for kill -9: nothing after it runs (no finally-block saves in the loop catch it)."""


def _kill_at_step(monkeypatch, step: int) -> None:
    import grainwright.trainer.loop as loop

    real, calls = loop.training_step, {"count": 0}

    def step_or_die(*args, **kwargs):
        calls["count"] += 1
        if calls["count"] > step:
            raise _Killed()
        return real(*args, **kwargs)

    monkeypatch.setattr(loop, "training_step", step_or_die)


@pytest.mark.slow
def test_a_kill_after_the_first_validation_keeps_those_steps(tmp_path, monkeypatch):
    """checkpoint.every_minutes far away: the save after the first validation is what a resume starts from."""
    folder = _noisy_folder(tmp_path / "data")
    _kill_at_step(monkeypatch, 15)
    with pytest.raises(_Killed):
        train_command(None, str(folder), scheme="neighbor2neighbor", steps=40, out=str(tmp_path / "run"),
                      announce=_quiet, assignments=TINY + ["checkpoint.every_minutes=100"])
    assert load_checkpoint(tmp_path / "run" / "checkpoints" / "last.pt")["step"] == 10  # validation every 10 steps
    monkeypatch.undo()
    summary, _ = train_command(None, None, resume=str(tmp_path / "run"), announce=_quiet)
    assert summary["steps"] == 40


@pytest.mark.slow
def test_the_first_checkpoint_interval_is_short(tmp_path, monkeypatch):
    """Without validation, last.pt is saved after FIRST_SAVE_SECONDS (0 here) rather than every_minutes."""
    import grainwright.trainer.loop as loop

    folder = _noisy_folder(tmp_path / "data")
    monkeypatch.setattr(loop, "FIRST_SAVE_SECONDS", 0.0)
    _kill_at_step(monkeypatch, 5)
    with pytest.raises(_Killed):
        train_command(None, str(folder), scheme="neighbor2neighbor", steps=40, out=str(tmp_path / "run"),
                      announce=_quiet, assignments=TINY + ["checkpoint.every_minutes=100",
                                                           "validation.every_steps=1000"])
    assert load_checkpoint(tmp_path / "run" / "checkpoints" / "last.pt")["step"] == 1  # then every 100 minutes


def test_validation_against_clean_patches_in_the_log_domain_ignores_the_speckle_bias():
    """A network that returned the clean log exactly would have been scored against a reference brightened by
    exp(-bias); the clean patches go back without the bias the output's inverse removes."""
    from types import SimpleNamespace

    from grainwright.inference.images.normalization import Normalization
    from grainwright.trainer.loop import validation_scores

    norm = Normalization("uint16", 12, 0.0, 4095.0, 1).with_log(looks=4.0, noisy_targets=True)
    clean = np.random.default_rng(0).uniform(0.1, 0.9, (2, 1, 16, 16)).astype(np.float32)
    clean_working = norm.to_working(clean * 4095.0)
    # The "noisy" input already holds what a perfect denoiser trained on noisy targets outputs: the clean log plus
    # the bias (in working units), which the identity model hands on.
    perfect = clean_working + np.float32(norm.transform["bias"] / norm.transform["scale"])
    np.testing.assert_allclose(norm.from_working_float(perfect), clean * 4095.0, rtol=1e-4)
    batch = {"noisy": perfect.astype(np.float32), "clean": clean_working}
    setup = SimpleNamespace(model=torch.nn.Identity(), normalization=norm, validation=[batch], ground_truth=True,
                            channels_last=False,
                            scheme=SimpleNamespace(validation_loss=lambda model, tensors: 0.0,
                                                   noise_level=lambda batch: None))
    assert validation_scores(setup)["psnr"] > 80.0
