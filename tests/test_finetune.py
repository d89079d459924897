"""Starting from the shipped starting model, the opt-out, continuing an earlier run, channel fit, and keeping the
better of the start and the end on held-out frames (grainwright.trainer.start).

Open data: crops of scikit-image's bundled ``camera`` image with Gaussian noise. Runs are a few steps of the
starting model's architecture on one thread.
"""
from __future__ import annotations

import json
import tomllib

import numpy as np
import pytest
import torch
from skimage import data

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images.imageio import write_image
from grainwright.models.checkpoint import load_checkpoint
from grainwright.models.starting import starting_model_manifest
from grainwright.trainer.config import defaults
from grainwright.trainer.run import train_command

SMALL = ["data.patch_size=32", "data.batch_size=8", "threads=1", "validation.every_steps=10",
         "validation.patches=16", "logging.progress=false", "logging.tensorboard=false",
         "model.channels_last=false", 'model.precision="float32"']
SIGMA = 25.0  # 8-bit units


def _noisy_folder(root, channels: int = 1, count: int = 4, size: int = 128):
    camera = data.camera().astype(np.float64)
    rng = np.random.default_rng(0)
    (root / "noisy").mkdir(parents=True, exist_ok=True)
    for i in range(count):
        crop = camera[64 + 96 * i:64 + 96 * i + size, 100 + 60 * i:100 + 60 * i + size]
        if channels > 1:
            crop = np.stack([crop * (0.6 + 0.2 * c) for c in range(channels)], axis=-1)
        noisy = np.clip(np.round(crop + rng.normal(0, SIGMA, crop.shape)), 0, 255).astype(np.uint8)
        write_image(root / "noisy" / f"crop{i}.png", noisy)
    return root


def _quiet(message: str) -> None:
    pass


def _same(first: dict[str, torch.Tensor], second: dict[str, torch.Tensor]) -> bool:
    return all(torch.equal(first[key], second[key]) for key in first)


@pytest.mark.slow
def test_the_starting_model_is_the_default_start_and_is_recorded_in_the_run_and_the_model(tmp_path):
    from grainwright.inference.runtime.modelinfo import read_model_metadata
    from grainwright.models.export import export_checkpoint

    folder = _noisy_folder(tmp_path / "data")
    lines: list[str] = []
    summary, run = train_command("noisy-only", str(folder), steps=10, out=str(tmp_path / "run"),
                                 announce=lines.append, assignments=SMALL)
    sha = starting_model_manifest()["weights_sha256"]
    assert summary["started_from"] == {"weights": "starting-model", "sha256": sha,
                                       "steps": starting_model_manifest()["total_steps"]}
    assert json.loads(run.summary.read_text())["started_from"]["sha256"] == sha
    assert 'weights = "starting-model"' in run.config.read_text()
    # The fine-tuning schedule replaces optim.lr and optim.warmup_fraction, and the resolved config says so.
    resolved = tomllib.loads(run.config.read_text())
    assert resolved["optim"]["lr"] == resolved["start"]["lr"] == defaults()["start"]["lr"]
    assert resolved["optim"]["warmup_fraction"] == resolved["start"]["warmup_fraction"] \
        == defaults()["start"]["warmup_fraction"] < defaults()["optim"]["warmup_fraction"]
    assert any(line.startswith("fine-tuning schedule: peak learning rate") for line in lines)
    assert any(line.startswith("start: fine-tuning the shipped starting model") for line in lines)
    assert f"started from the starting model (sha256 {sha[:12]})" in lines[-1]
    # start.pt holds the shipped weights as they were before the first step.
    from grainwright.models.starting import load_starting_model
    assert _same(load_starting_model()["state_dict"], load_checkpoint(run.start)["state_dict"])
    exported = export_checkpoint(run.root, tmp_path / "model.onnx", threads=1)
    metadata = read_model_metadata(exported.path)
    assert metadata["started_from"]["weights"] == "starting-model" and metadata["started_from"]["sha256"] == sha
    assert metadata["selection"]["kept"] in ("fine-tuned", "start")


@pytest.mark.slow
def test_the_opt_out_key_trains_from_random_weights(tmp_path):
    from grainwright.models.starting import load_starting_model

    folder = _noisy_folder(tmp_path / "data")
    summary, run = train_command("noisy-only", str(folder), steps=4, out=str(tmp_path / "run"), announce=_quiet,
                                 assignments=SMALL + ['start.weights="random"'])
    assert summary["started_from"]["weights"] == "random" and summary["selection"] is None
    assert not run.start.exists()
    assert 'weights = "random"' in run.config.read_text()
    assert tomllib.loads(run.config.read_text())["optim"]["warmup_fraction"] == defaults()["optim"]["warmup_fraction"]
    shipped, trained = load_starting_model()["state_dict"], load_checkpoint(run.best)["state_dict"]
    # Four small steps from the shipped weights would leave them close; random weights are far from them.
    distance = sum(float((shipped[key] - trained[key]).abs().mean()) for key in shipped) / len(shipped)
    assert distance > 0.01


@pytest.mark.slow
def test_another_architecture_starts_from_random_weights_and_says_why(tmp_path):
    folder = _noisy_folder(tmp_path / "data")
    lines: list[str] = []
    summary, run = train_command("noisy-only", str(folder), steps=2, out=str(tmp_path / "run"),
                                 announce=lines.append, assignments=SMALL + ["model.hyper.width=8"])
    assert summary["started_from"]["weights"] == "random"
    assert "width 8" in summary["started_from"]["reason"]
    assert any(line.startswith("start: random weights: the configured architecture") for line in lines)
    assert 'weights = "random"' in run.config.read_text()  # the resolved config says what happened


@pytest.mark.slow
def test_a_few_fine_tuning_steps_lower_the_held_out_criterion(tmp_path):
    # MC-SURE (Stein 1981; Ramani, Blu and Unser 2008) on the held-out frame, Gaussian noise of sigma 25/255.
    folder = _noisy_folder(tmp_path / "data")
    summary, run = train_command("noisy-only", str(folder), steps=40, out=str(tmp_path / "run"), announce=_quiet,
                                 assignments=SMALL)
    selection = summary["selection"]
    assert selection["criterion"] == "MC-SURE" and selection["frames"] == 1
    assert selection["fine_tuned"] < selection["start"] and selection["kept"] == "fine-tuned"
    assert selection["noise_margin"] == 0.05
    assert all(ft < st for ft, st in zip(selection["fine_tuned_across_margin"], selection["start_across_margin"]))
    assert not _same(load_checkpoint(run.best)["state_dict"], load_checkpoint(run.start)["state_dict"])


@pytest.mark.slow
def test_a_fine_tune_that_ends_worse_keeps_the_starting_state_and_says_so(tmp_path):
    folder = _noisy_folder(tmp_path / "data")
    lines: list[str] = []
    # Adam with a peak learning rate of 0.1 moves every weight by about 0.1 per step: the network is wrecked.
    summary, run = train_command("noisy-only", str(folder), steps=5, out=str(tmp_path / "run"),
                                 announce=lines.append,
                                 assignments=SMALL + ["start.lr=0.1", "start.warmup_fraction=0"])
    selection = summary["selection"]
    assert selection["kept"] == "start" and selection["fine_tuned"] > selection["start"]
    assert "kept the starting state (fine-tuning did not help)" in lines[-1]
    assert json.loads(run.summary.read_text())["selection"]["kept"] == "start"
    assert _same(load_checkpoint(run.best)["state_dict"], load_checkpoint(run.start)["state_dict"])
    assert load_checkpoint(run.best)["training_summary"]["selection"]["kept"] == "start"


@pytest.mark.slow
def test_continuing_an_earlier_run_starts_from_its_weights(tmp_path):
    folder = _noisy_folder(tmp_path / "data")
    _, first = train_command("noisy-only", str(folder), steps=4, out=str(tmp_path / "first"), announce=_quiet,
                             assignments=SMALL)
    summary, second = train_command("noisy-only", str(folder), steps=4, out=str(tmp_path / "second"),
                                    announce=_quiet, assignments=SMALL + [f'start.weights="{first.root}"'])
    assert summary["started_from"]["weights"] == "earlier run"
    assert summary["started_from"]["path"] == str(first.best)
    assert _same(load_checkpoint(first.best)["state_dict"], load_checkpoint(second.start)["state_dict"])


def test_a_data_set_whose_channels_do_not_fit_gets_one_line_naming_the_opt_out_key(tmp_path):
    folder = _noisy_folder(tmp_path / "data", channels=3, count=2, size=64)
    with pytest.raises(ConfigError, match=r'start\.weights = \\?"random\\?"') as caught:
        train_command("noisy-only", str(folder), steps=2, out=str(tmp_path / "run"), announce=_quiet,
                      assignments=SMALL + ["model.hyper.per_channel=false"])
    assert "3 channels" in str(caught.value) and "\n" not in str(caught.value)
    assert not (tmp_path / "run").exists()


def test_a_bad_start_weights_path_fails_first_in_one_line_naming_the_key(tmp_path, monkeypatch, capsys):
    import grainwright.trainer.run as run_module
    from grainwright.console.cli import main

    def no_work(*args, **kwargs):  # neither the data nor the step-time measurement may be reached
        raise AssertionError("work started before start.weights was checked")

    monkeypatch.setattr(run_module, "_read_training_images", no_work)
    monkeypatch.setattr(run_module, "fastest_step", no_work)
    folder = _noisy_folder(tmp_path / "data", count=2, size=64)
    missing = tmp_path / "no-such-run"
    with pytest.raises(ConfigError, match="start.weights") as caught:
        train_command("noisy-only", str(folder), steps=2, out=str(tmp_path / "run"), announce=_quiet,
                      assignments=SMALL + [f'start.weights="{missing.as_posix()}"'])
    assert str(missing) in str(caught.value) and "\n" not in str(caught.value)
    empty = tmp_path / "not-a-run"
    empty.mkdir()
    assert main(["train", "--data", str(folder), "--steps", "2", "--out", str(tmp_path / "run"),
                 "--set", f'start.weights="{empty.as_posix()}"']) == 2
    error = capsys.readouterr().err.strip().splitlines()
    assert len(error) == 1 and "start.weights" in error[0] and "best checkpoint" in error[0]
    assert not (tmp_path / "run").exists()


@pytest.mark.slow
def test_an_earlier_run_of_other_channels_gets_one_line_naming_the_opt_out_key(tmp_path):
    gray = _noisy_folder(tmp_path / "gray", count=2, size=64)
    _, first = train_command("noisy-only", str(gray), steps=2, out=str(tmp_path / "first"), announce=_quiet,
                             assignments=SMALL)
    colour = _noisy_folder(tmp_path / "colour", channels=3, count=2, size=64)
    with pytest.raises(ConfigError, match="start.weights") as caught:
        train_command("noisy-only", str(colour), steps=2, out=str(tmp_path / "run"), announce=_quiet,
                      assignments=SMALL + [f'start.weights="{first.root}"'])
    assert "1-channel" in str(caught.value) and "3-channel" in str(caught.value)
    assert not (tmp_path / "run").exists()


@pytest.mark.slow
def test_colour_data_fine_tune_the_grayscale_starting_model_channel_by_channel(tmp_path):
    folder = _noisy_folder(tmp_path / "data", channels=3, count=2, size=64)
    summary, run = train_command("noisy-only", str(folder), steps=2, out=str(tmp_path / "run"), announce=_quiet,
                                 assignments=SMALL)
    assert summary["started_from"]["weights"] == "starting-model"
    assert load_checkpoint(run.best)["hyper"]["per_channel"] is True


def test_the_poisson_gaussian_selection_scores_the_error_before_the_transform():
    # Luisier, Blu and Unser (IEEE TIP 2011), first order: a run trained after the generalized Anscombe transform is
    # judged by the mean squared error of the whole chain (transform, network, inverse) on the untransformed values,
    # where the images' PSNR is measured. A fixed 5 x 5 box blur stands in for the network; the truth is computed
    # with the clean frame (scikit-image's camera).
    from types import SimpleNamespace

    from grainwright.inference.images.normalization import Normalization
    from grainwright.trainer.start import CRITERIA, criterion_for, heldout_score

    gain, read = 0.01, 0.02
    normalization = Normalization("float32", None, 0.0, 1.0, 1).with_anscombe(gain, read)
    clean = 0.1 + 0.8 * data.camera()[128:384, 128:384, None].astype(np.float64) / 255
    rng = np.random.default_rng(4)
    noisy = gain * rng.poisson(clean / gain) + read * rng.standard_normal(clean.shape)
    working = normalization.to_working(noisy)
    blur = torch.nn.Conv2d(1, 1, 5, padding=2, padding_mode="reflect", bias=False)
    torch.nn.init.constant_(blur.weight, 1 / 25)
    scheme = SimpleNamespace(sigma=np.array([1.0]), noise_level=lambda batch: None)
    frames = [{"noisy": working}]
    criterion = criterion_for(frames, normalization, SimpleNamespace(kind="poisson-gaussian"), scheme)
    assert criterion == "sure-poisson-gaussian" and CRITERIA[criterion].startswith("MC-SURE")
    score = heldout_score(blur, frames, criterion, scheme, seed=0, normalization=normalization).value
    with torch.no_grad():
        output = blur(torch.from_numpy(working.transpose(2, 0, 1)[None].copy()))[0].numpy().transpose(1, 2, 0)
    true = float(np.mean((normalization.from_working_float(output).astype(np.float64) - clean) ** 2))
    assert score == pytest.approx(true, rel=0.03)


def test_the_check_holds_across_the_noise_margin_and_its_slope_is_sure_at_a_scaled_variance():
    # SURE is linear in the noise variance it assumes (Stein 1981; Ramani, Blu and Unser 2008, eq. 6): the score's
    # slope predicts the estimate recomputed with the variance scaled by 1.05.
    from types import SimpleNamespace

    from grainwright.inference.evaluation.sure import sure_mse
    from grainwright.trainer.start import HeldoutScore, fine_tuned_is_better, heldout_score

    sigma = 0.1
    clean = data.camera()[128:384, 128:384, None].astype(np.float64) / 255
    noisy = (clean + np.random.default_rng(2).normal(0, sigma, clean.shape)).astype(np.float32)
    blur = torch.nn.Conv2d(1, 1, 3, padding=1, padding_mode="reflect", bias=False)
    torch.nn.init.constant_(blur.weight, 1 / 9)
    scheme = SimpleNamespace(sigma=np.array([sigma]), noise_level=lambda batch: None)
    score = heldout_score(blur, [{"noisy": noisy}], "sure", scheme, seed=0)

    def denoise(image):
        with torch.no_grad():
            tensor = torch.from_numpy(np.ascontiguousarray(image.transpose(2, 0, 1)[None], dtype=np.float32))
            return blur(tensor)[0].numpy().transpose(1, 2, 0)

    scaled = sure_mse(denoise, noisy, sigma * np.sqrt(1.05), seed=0, epsilon=2.0 * sigma * noisy.size ** -0.3)
    assert score.at(1.05) == pytest.approx(scaled.mse, rel=1e-3)
    # A fine-tuned state better at the assumed level by less than what a 5% error of the variance moves the
    # difference is not kept; one better across the band is.
    start, smoother = HeldoutScore(1.00, slope=0.5), HeldoutScore(0.99, slope=0.2)
    assert smoother.at(1.0) < start.at(1.0) and not fine_tuned_is_better(start, smoother, 0.05)
    assert fine_tuned_is_better(start, HeldoutScore(0.98, slope=0.2), 0.05)
    assert fine_tuned_is_better(start, smoother, 0.0)


def test_the_consistency_weight_defaults_to_1_when_fine_tuning_and_2_from_random_weights():
    """``neighbor2neighbor.gamma = "auto"`` (the default): Huang et al. 2021's final weight 2 from random weights,
    1 for single-frame fine-tuning (measured, docs/benchmarks.md); the stack scheme keeps 2; a number applies."""
    from grainwright.trainer.config import load_config
    from grainwright.trainer.schemes.neighbor2neighbor import Neighbor2Neighbor
    from grainwright.trainer.schemes.neighbor2neighbor_stack import Neighbor2NeighborStack

    fine_tuning = load_config(None)
    assert fine_tuning["neighbor2neighbor"]["gamma"] == "auto" and fine_tuning["start"]["weights"] == "starting-model"
    from_random = load_config(None, ['start.weights="random"'])
    assert Neighbor2Neighbor.gamma_for(fine_tuning) == 1.0 and Neighbor2Neighbor.gamma_for(from_random) == 2.0
    assert Neighbor2NeighborStack.gamma_for(fine_tuning) == Neighbor2NeighborStack.gamma_for(from_random) == 2.0
    assert Neighbor2Neighbor.gamma_for(load_config(None, ["neighbor2neighbor.gamma=0.5"])) == 0.5
    with pytest.raises(ConfigError, match="neighbor2neighbor.gamma: expected a number or \"auto\""):
        load_config(None, ['neighbor2neighbor.gamma="strong"'])


@pytest.mark.slow
@pytest.mark.parametrize("start, gamma", [("starting-model", 1.0), ("random", 2.0)])
def test_the_run_records_the_consistency_weight_it_used(tmp_path, start, gamma):
    folder = _noisy_folder(tmp_path / "data")
    lines: list[str] = []
    summary, run = train_command("noisy-only", str(folder), steps=2, out=str(tmp_path / "run"), announce=lines.append,
                                 assignments=SMALL + ['scheme="neighbor2neighbor"', f'start.weights="{start}"'])
    assert summary["neighbor2neighbor_gamma"] == gamma
    assert tomllib.loads(run.config.read_text())["neighbor2neighbor"]["gamma"] == gamma
    assert any(line.startswith(f"consistency regulariser: gamma {gamma:g}") for line in lines), lines
