"""``grainwright demo``: the output folder rules, and the whole path with a tiny budget."""
from __future__ import annotations

import json
import math
import subprocess
import sys

import numpy as np
import pytest

from grainwright.console.demo import (
    FINE_TUNED,
    FOCUS_SHARE,
    MARKER_FILE,
    MARKER_KIND,
    RANDOM_WEIGHTS,
    STARTING_ALONE,
    DemoSettings,
    prepare_out_dir,
    run_demo,
)
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.images.imageio import read_image


def test_refuses_a_non_empty_folder_it_did_not_write(tmp_path):
    (tmp_path / "notes.txt").write_text("keep me")
    with pytest.raises(InputError, match="not a previous demo folder"):
        prepare_out_dir(tmp_path)
    assert (tmp_path / "notes.txt").read_text() == "keep me"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]


def test_refuses_a_folder_with_a_foreign_demo_json(tmp_path):
    (tmp_path / MARKER_FILE).write_text('{"kind": "something else"}')
    with pytest.raises(InputError, match="not a previous demo folder"):
        prepare_out_dir(tmp_path)


def test_reuses_a_previous_demo_folder_and_keeps_other_files(tmp_path):
    (tmp_path / MARKER_FILE).write_text(json.dumps({"kind": MARKER_KIND, "status": "finished"}))
    (tmp_path / "scenario" / "train").mkdir(parents=True)
    (tmp_path / "scenario" / "train" / "frame-000.tif").write_bytes(b"old")
    (tmp_path / "model.onnx").write_bytes(b"old")
    (tmp_path / "my-notes.txt").write_text("mine")
    prepare_out_dir(tmp_path)
    assert not (tmp_path / "scenario").exists() and not (tmp_path / "model.onnx").exists()
    assert (tmp_path / "my-notes.txt").read_text() == "mine"


def test_new_and_empty_folders_are_accepted(tmp_path):
    assert prepare_out_dir(tmp_path / "a" / "b").is_dir()
    assert prepare_out_dir(tmp_path / "a" / "b").is_dir()  # now empty: still fine


def test_command_line_error_is_one_line_and_exit_2(tmp_path):
    (tmp_path / "data.csv").write_text("1,2,3")
    result = subprocess.run(
        [sys.executable, "-m", "grainwright.console", "demo", "--out", str(tmp_path)],
        capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 2
    assert result.stderr.count("\n") == 1 and "not a previous demo folder" in result.stderr


def test_budget_must_be_positive(tmp_path):
    with pytest.raises(ConfigError, match="--minutes"):
        run_demo(tmp_path, DemoSettings(minutes=0))
    assert not any(tmp_path.iterdir())


def test_a_wrong_training_setting_stops_the_demo_before_anything_is_written(tmp_path, capsys):
    from grainwright.console.cli import main

    # "float16" is not one of the trainer's precisions (auto, float32, bfloat16); the key itself is misspelt too.
    assert main(["demo", "--out", str(tmp_path / "a"), "--set", "model.precision=float16"]) == 2
    assert main(["demo", "--out", str(tmp_path / "b"), "--set", "model.precison=float32"]) == 2
    errors = capsys.readouterr().err.splitlines()
    assert len(errors) == 2
    assert "model.precision: 'float16' is not one of auto, float32, bfloat16" in errors[0]
    assert "model.precison: unknown key" in errors[1] and "model.precision" in errors[1]
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()


def test_command_line_options_reach_the_settings(monkeypatch, tmp_path):
    from grainwright.console.cli import main
    from grainwright.console.commands import demo as command

    seen = {}
    monkeypatch.setattr(command, "run_demo", lambda out, settings: seen.update(out=out, settings=settings))
    assert main(["demo", "--out", str(tmp_path), "--seed", "3", "--minutes", "2.5", "--set", "model.precision=float32",
                 "--set", "optim.lr=5e-4", "--skip-random-weights"]) == 0
    settings = seen["settings"]
    assert settings.seed == 3 and settings.minutes == 2.5 and not settings.random_weights_row
    assert settings.train_settings == ["model.precision=float32", "optim.lr=5e-4"]
    assert settings.train_on_scored
    assert main(["demo", "--out", str(tmp_path), "--scored-frames-unseen"]) == 0
    assert seen["settings"].random_weights_row and seen["settings"].train_settings == []
    assert not seen["settings"].train_on_scored


TINY = dict(steps=4, train_frames=5, holdout_frames=1, frame_size=64, large_size=(96, 160), threads=1, progress=False)
# Patches of 32 pixels leave each 64-pixel frame a held-out strip of one patch (the region split needs it).
TINY_TRAINING = ["data.batch_size=4", "data.patch_size=32", "validation.every_steps=2", "validation.patches=4",
                 "logging.tensorboard=false", "model.precision=float32"]


@pytest.mark.slow
def test_whole_demo_with_a_tiny_budget(tmp_path):
    settings = DemoSettings(**TINY, train_settings=TINY_TRAINING)
    lines: list[str] = []
    summary = run_demo(tmp_path, settings, echo=lines.append)

    marker = json.loads((tmp_path / MARKER_FILE).read_text())
    assert marker["kind"] == MARKER_KIND and marker["status"] == "finished"
    # Trained on the corrected noisy frames alone: single noisy images, and no clean folder in the data.
    assert summary["training"]["layout"] == "noisy-only"
    assert summary["training"]["scheme"] in ("recorrupted", "neighbor2neighbor")
    assert not (tmp_path / "corrected" / "train" / "clean").exists()
    assert (tmp_path / "corrected" / "train" / "noise.toml").is_file()
    # The scored frames trained as the frames to be denoised: the training folder holds the very corrected noisy
    # frames the report scores (never their clean versions), and a strip of every frame is held out.
    scored = sorted((tmp_path / "corrected" / "holdout").iterdir())
    assert scored and all(np.array_equal(read_image(path), read_image(tmp_path / "corrected" / "train" /
                                                                     f"scored-{path.name}")) for path in scored)
    clean = [read_image(path) for path in sorted((tmp_path / "scenario" / "holdout" / "clean").iterdir())]
    for path in (tmp_path / "corrected" / "train").glob("*.tif"):
        assert not any(np.array_equal(read_image(path), image) for image in clean)
    config = (tmp_path / "training-run" / "config.toml").read_text()
    assert 'validation_split = "regions"' in config
    # ... and they get their fixed share of the training patches, in both trainings.
    assert 'focus_frames = "scored-*"' in config and f"focus_share = {FOCUS_SHARE}" in config
    assert 'focus_frames = "scored-*"' in (tmp_path / "training-run-random-weights" / "config.toml").read_text()

    # Three learned rows: the default training fine-tunes the starting model; the starting model alone; and the
    # same number of steps from random weights. The --set reached both trainings.
    learned = marker["learned"]
    assert list(learned) == [FINE_TUNED, STARTING_ALONE, RANDOM_WEIGHTS] and marker["main_model"] == FINE_TUNED
    assert learned[FINE_TUNED]["started_from"]["weights"] == "starting-model"
    assert learned[FINE_TUNED]["kept_state"] in ("fine-tuned", "start")
    assert learned[FINE_TUNED]["selection"]["kept"] == learned[FINE_TUNED]["kept_state"]
    assert learned[RANDOM_WEIGHTS]["started_from"]["weights"] == "random"
    assert learned[RANDOM_WEIGHTS]["steps"] == learned[FINE_TUNED]["steps"] == 4
    assert learned[STARTING_ALONE]["steps"] == 0
    for role in (FINE_TUNED, RANDOM_WEIGHTS):
        assert learned[role]["precision"] == "float32"
    for role, row in learned.items():
        assert (tmp_path / f"{role}.onnx").is_file()
        assert row["export"]["parity_max_abs_diff"] <= 1e-4
        assert math.isfinite(row["psnr_db"]) and 1 <= row["psnr_rank"] <= 14
        assert 1 <= row["sure_rank_without_ground_truth"] <= 14
        assert row["crack_contrast_retention"] is None or math.isfinite(row["crack_contrast_retention"])
    results = json.loads((tmp_path / "report" / "with-ground-truth" / "results.json").read_text())
    assert {FINE_TUNED, STARTING_ALONE, RANDOM_WEIGHTS} <= {entry["method"] for entry in results["ranking"]}

    assert (tmp_path / "denoised" / "large-000.tif").is_file()
    for name in ("with-ground-truth", "without-ground-truth"):
        assert (tmp_path / "report" / name / "index.html").is_file()
    compare = summary["compare"]
    assert math.isfinite(compare["psnr_gain_db"])
    # Three learned models, each also with the 8-fold flip/rotation ensemble, and the eight classical baselines.
    assert compare["methods"] == 14
    assert compare["ensemble"]["method"] == f"{FINE_TUNED} x8" and compare["ensemble"]["size"] == 8
    assert 1 <= compare["ensemble"]["psnr_rank"] <= 14 and math.isfinite(compare["ensemble"]["psnr_db"])
    assert set(compare["crack_contrast_retention_by_method"]["with-ground-truth"]) >= {"bm3d", FINE_TUNED}
    assert summary["large_frame"]["seconds_per_megapixel"] > 0
    text = "\n".join(lines)
    assert "PSNR gain of fine-tuned over the best classical method" in text and "index.html" in text
    assert "[7/7" in text and all(f"  {role} " in text for role in [*learned, f"{FINE_TUNED} x8"])
    assert "with the 8-fold flip/rotation ensemble" in text

    # A second run into the same folder is allowed: it is a previous demo folder.
    prepare_out_dir(tmp_path)
    assert [p.name for p in tmp_path.iterdir()] == [MARKER_FILE]


@pytest.mark.slow
def test_a_demo_set_to_start_from_random_weights_has_no_separate_record_row(tmp_path):
    settings = DemoSettings(**TINY, train_settings=[*TINY_TRAINING, 'start.weights="random"'], train_on_scored=False)
    lines: list[str] = []
    summary = run_demo(tmp_path, settings, echo=lines.append)
    assert list(summary["learned"]) == [RANDOM_WEIGHTS, STARTING_ALONE] and summary["main_model"] == RANDOM_WEIGHTS
    assert summary["compare"]["methods"] == 12
    assert (tmp_path / "random-weights.onnx").is_file() and not (tmp_path / "fine-tuned.onnx").exists()
    assert not (tmp_path / "training-run-random-weights").exists()
    assert "[6/6" in "\n".join(lines)
    # Scored frames kept unseen: the training folder holds the training frames alone, split by whole images.
    assert not list((tmp_path / "corrected" / "train").glob("scored-*"))
    config = (tmp_path / "training-run" / "config.toml").read_text()
    assert 'validation_split = "images"' in config and 'focus_frames = ""' in config
