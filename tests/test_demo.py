"""``grainwright demo``: the output folder rules, and the whole path with a tiny budget."""
from __future__ import annotations

import json
import math
import subprocess
import sys

import pytest

from grainwright.console.demo import (
    MARKER_FILE,
    MARKER_KIND,
    DemoSettings,
    prepare_out_dir,
    run_demo,
)
from grainwright.inference.common.errors import ConfigError, InputError


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


@pytest.mark.slow
def test_whole_demo_with_a_tiny_budget(tmp_path):
    settings = DemoSettings(
        steps=4, train_frames=3, holdout_frames=1, frame_size=64, large_size=(96, 160), threads=1, progress=False,
        train_settings=['model.name="residual"', "model.hyper={depth=3, width=8}", "data.batch_size=4", "data.patch_size=48",
                        "validation.every_steps=2", "validation.patches=4", "logging.tensorboard=false"],
    )
    lines: list[str] = []
    summary = run_demo(tmp_path, settings, echo=lines.append)

    marker = json.loads((tmp_path / MARKER_FILE).read_text())
    assert marker["kind"] == MARKER_KIND and marker["status"] == "finished"
    # Trained on the corrected noisy frames alone: single noisy images, and no clean folder in the data.
    assert summary["training"]["layout"] == "noisy-only"
    assert summary["training"]["scheme"] in ("recorrupted", "neighbor2neighbor")
    assert not (tmp_path / "corrected" / "train" / "clean").exists()
    assert (tmp_path / "corrected" / "train" / "noise.toml").is_file()
    assert summary["export"]["parity_max_abs_diff"] <= 1e-4
    assert (tmp_path / "model.onnx").is_file()
    assert (tmp_path / "denoised" / "large-000.tif").is_file()
    for name in ("with-ground-truth", "without-ground-truth"):
        assert (tmp_path / "report" / name / "index.html").is_file()
        assert (tmp_path / "report" / name / "results.json").is_file()
    compare = summary["compare"]
    assert math.isfinite(compare["psnr_gain_db"])
    assert 1 <= compare["sure_rank_learned_without_ground_truth"] <= compare["methods"]
    assert compare["methods"] == 9  # the model and the eight classical baselines
    assert summary["large_frame"]["seconds_per_megapixel"] > 0
    text = "\n".join(lines)
    assert "PSNR gain over the best classical method" in text and "index.html" in text

    # A second run into the same folder is allowed: it is a previous demo folder.
    prepare_out_dir(tmp_path)
    assert [p.name for p in tmp_path.iterdir()] == [MARKER_FILE]
