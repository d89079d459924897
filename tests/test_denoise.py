"""``grainwright denoise``: mirrored outputs, safe writes, resumable and traceable batches, no torch needed."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import tifffile
from no_torch import BLOCK_TORCH
from test_runner import NATIVE_HIGH, build_conv_model

from grainwright.console.cli import main
from grainwright.inference.images.imageio import read_frames, read_text, write_image
from grainwright.inference.runtime.runner import OnnxDenoiser, file_sha256


@pytest.fixture
def batch(tmp_path: Path) -> dict[str, Path]:
    """A model and an input folder of mixed formats, dtypes and frame counts (uniform random test pixels)."""
    rng = np.random.default_rng(0)
    inputs = tmp_path / "in"
    write_image(inputs / "a.png", rng.integers(0, 1000, (50, 60, 1)).astype(np.uint16))
    write_image(inputs / "b.tif", rng.integers(0, 1000, (3, 40, 30, 1)).astype(np.uint16))
    write_image(inputs / "sub" / "c.npy", rng.uniform(0, 1000, (33, 20, 1)).astype(np.float32))
    write_image(inputs / "d.png", rng.integers(0, 256, (20, 25, 1)).astype(np.uint8))
    return {"model": build_conv_model(tmp_path / "m.onnx", training_sigma=20.0), "in": inputs,
            "out": tmp_path / "out"}


def _run(*argv: object) -> int:
    return main(["denoise", *map(str, argv), "-q", "--threads", "1"])


def test_outputs_mirror_inputs_with_records(batch, capsys):
    assert _run(batch["model"], batch["in"], "-o", batch["out"], "-r") == 0
    assert "done 4, skipped 0, failed 0" in capsys.readouterr().out
    denoiser = OnnxDenoiser(batch["model"], threads=1)
    for name in ("a.png", "b.tif", "sub/c.npy", "d.png"):
        source, output = batch["in"] / name, batch["out"] / name
        frames, written = read_frames(source), read_frames(output)
        assert written.shape == frames.shape and written.dtype == frames.dtype
        for frame, out in zip(frames, written):
            np.testing.assert_array_equal(out, denoiser.run(frame))
        record = json.loads(read_text(output))
        assert record["model_sha256"] == file_sha256(batch["model"])
        assert record["settings"]["strength"] == 1.0 and record["source"] == Path(name).name
    assert not [p for p in batch["out"].rglob(".*")]  # no temporary files left


def test_rerun_skips_finished_outputs_and_refuses_changed_settings(batch, capsys):
    assert _run(batch["model"], batch["in"], "-o", batch["out"]) == 0
    (batch["out"] / "d.png").unlink()  # as if the batch had been killed before d.png
    first = (batch["out"] / "a.png").stat().st_mtime_ns
    assert _run(batch["model"], batch["in"], "-o", batch["out"]) == 0
    assert "done 1, skipped 2, failed 0" in capsys.readouterr().out
    assert (batch["out"] / "a.png").stat().st_mtime_ns == first
    # Another strength: refuse to mix unless told.
    assert _run(batch["model"], batch["in"], "-o", batch["out"], "--strength", "0.5") == 2
    assert "another model or other settings" in capsys.readouterr().err
    assert _run(batch["model"], batch["in"], "-o", batch["out"], "--strength", "0.5", "--keep-mixed") == 0
    assert json.loads(read_text(batch["out"] / "a.png"))["settings"]["strength"] == 1.0
    assert _run(batch["model"], batch["in"], "-o", batch["out"], "--strength", "0.5", "--overwrite") == 0
    assert json.loads(read_text(batch["out"] / "a.png"))["settings"]["strength"] == 0.5


def test_foreign_existing_output_is_not_overwritten(batch, capsys):
    foreign = np.full((50, 60, 1), 7, np.uint16)
    write_image(batch["out"] / "a.png", foreign)
    assert _run(batch["model"], batch["in"] / "a.png", "-o", batch["out"]) == 1
    assert "not written by grainwright denoise" in capsys.readouterr().err
    np.testing.assert_array_equal(read_frames(batch["out"] / "a.png")[0], foreign)


def test_never_writes_into_the_input_folder_unless_asked(batch, capsys):
    source = batch["in"] / "a.png"
    before = source.read_bytes()
    assert _run(batch["model"], source, "-o", batch["in"]) == 2
    assert "--into-input-folder" in capsys.readouterr().err
    assert _run(batch["model"], source, "-o", batch["in"], "--into-input-folder", "--overwrite") == 1
    assert "would overwrite this input" in capsys.readouterr().err
    assert source.read_bytes() == before
    assert _run(batch["model"], source, "-o", batch["in"], "--into-input-folder", "--format", "tif") == 0
    assert (batch["in"] / "a.tif").exists()


def test_bad_files_are_reported_and_skipped(batch, capsys):
    write_image(batch["in"] / "rgb.tif", np.zeros((10, 10, 3), np.uint8))
    write_image(batch["in"] / "nan.npy", np.full((10, 10, 1), np.nan, np.float32))
    (batch["in"] / "broken.tif").write_bytes(b"II*\x00 truncated")
    assert _run(batch["model"], batch["in"], "-o", batch["out"], "-r") == 1
    captured = capsys.readouterr()
    assert "done 4, skipped 0, failed 3" in captured.out
    for name, problem in [("rgb.tif", "3 channel"), ("nan.npy", "NaN"), ("broken.tif", "failed")]:
        assert any(name in line and problem in line for line in captured.err.splitlines()), name
        assert not (batch["out"] / name).exists()


def test_format_and_float32_options(batch):
    assert _run(batch["model"], batch["in"] / "a.png", "-o", batch["out"], "--format", "tif", "--float32") == 0
    written = tifffile.imread(batch["out"] / "a.tif")
    assert written.dtype == np.float32 and written.shape == (50, 60)
    expected = OnnxDenoiser(batch["model"], threads=1).run(read_frames(batch["in"] / "a.png")[0], as_float=True)
    np.testing.assert_allclose(written, expected[:, :, 0], atol=1e-3)


def test_domain_check_warns_about_noise_level(batch, capsys):
    # Open data: scikit-image's camera image with Gaussian noise of sigma 100 (native), 5x the training level 20.
    from skimage import data

    noisy = data.camera()[:128, :128].astype(float) * (NATIVE_HIGH / 255)
    noisy += np.random.default_rng(1).normal(0, 100, noisy.shape)
    write_image(batch["in"] / "noisy.tif", np.clip(noisy, 0, 1000).astype(np.uint16)[:, :, None])
    write_image(batch["in"] / "matched.tif",
                np.clip(noisy / 5 + 400, 0, 1000).astype(np.uint16)[:, :, None])  # sigma about 20
    assert _run(batch["model"], batch["in"] / "noisy.tif", batch["in"] / "matched.tif", "-o", batch["out"]) == 0
    err = capsys.readouterr().err
    assert "noisy.tif: noise level" in err and "training level" in err
    assert "matched.tif" not in err


def test_model_without_metadata_is_refused_on_one_line(batch, tmp_path, capsys):
    bare = build_conv_model(tmp_path / "bare.onnx", metadata=False)
    assert _run(bare, batch["in"] / "a.png", "-o", batch["out"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "no grainwright metadata" in err
    assert _run(bare, batch["in"] / "a.png", "-o", batch["out"], "--receptive-field", "7") == 0


def test_killed_batch_leaves_no_partial_output(batch, monkeypatch):
    calls = {"n": 0}
    original = OnnxDenoiser.infer

    def dies_midway(self, windows, sigma=None):
        calls["n"] += 1
        if calls["n"] == 2:
            raise KeyboardInterrupt
        return original(self, windows, sigma)

    monkeypatch.setattr(OnnxDenoiser, "infer", dies_midway)
    assert _run(batch["model"], batch["in"] / "b.tif", "-o", batch["out"], "--tile", "8") == 130
    assert not batch["out"].exists() or not any(batch["out"].iterdir())


@pytest.mark.parametrize("architecture", ["residual", "residual-noisemap"])
def test_denoise_runs_with_torch_blocked(batch, tmp_path, architecture):
    # The model is exported here (torch is allowed in the test process); the run itself must not need torch.
    from grainwright.inference.images.normalization import Normalization
    from grainwright.models.checkpoint import new_checkpoint, save_checkpoint
    from grainwright.models.export import export_checkpoint

    normalization = Normalization(dtype="uint16", bit_depth=10, low=0.0, high=1023.0, channels=1)
    payload = new_checkpoint(architecture, 1, normalization, hyper={"depth": 3, "width": 8})
    export_checkpoint(save_checkpoint(tmp_path / "model.pt", payload), tmp_path / "model.onnx", threads=1)
    script = BLOCK_TORCH + (
        "from grainwright.console.cli import main\n"
        f"code = main(['denoise', {str(tmp_path / 'model.onnx')!r}, {str(batch['in'])!r}, "
        f"'-o', {str(batch['out'])!r}, '-r', '-q', '--threads', '1'])\n"
        "assert sys.modules.get('torch') is None\n"
        "sys.exit(code)\n"
    )
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert "done 4, skipped 0, failed 0" in result.stdout
    assert read_frames(batch["out"] / "b.tif").shape == (3, 40, 30, 1)


def test_row_banding_is_removed_before_denoising_when_flagged(tmp_path, capsys):
    # A smooth ramp with independent row offsets (fixed-pattern noise) and white noise: the banding flag and
    # correction are the foundation's (estimation.detect_banding / correct_fixed_pattern), as in training.
    from grainwright.inference.noise.estimation import (
        correct_fixed_pattern,
        detect_banding,
    )

    rng = np.random.default_rng(3)
    ramp = np.linspace(300, 800, 96)[None, :] * np.ones((96, 1))
    frame = ramp + rng.normal(0, 12, (96, 96)) + rng.normal(0, 30, (96, 1))
    frame = np.clip(np.rint(frame), 0, NATIVE_HIGH).astype(np.uint16)[:, :, None]
    assert detect_banding(frame).flagged
    write_image(tmp_path / "in" / "banded.tif", frame)
    model = build_conv_model(tmp_path / "m.onnx", training_sigma=20.0)
    denoiser = OnnxDenoiser(model, threads=1)

    assert _run(model, tmp_path / "in", "-o", tmp_path / "auto") == 0
    assert "banding removed" in capsys.readouterr().err
    corrected = read_frames(tmp_path / "auto" / "banded.tif")[0]
    expected = denoiser.run(correct_fixed_pattern(frame), as_float=True)
    np.testing.assert_allclose(corrected, np.clip(np.rint(expected), 0, NATIVE_HIGH), atol=1)
    assert json.loads(read_text(tmp_path / "auto" / "banded.tif"))["fixed_pattern_corrected"] == [True]

    assert _run(model, tmp_path / "in", "-o", tmp_path / "never", "--fixed-pattern", "never") == 0
    kept = read_frames(tmp_path / "never" / "banded.tif")[0]
    np.testing.assert_array_equal(kept, denoiser.run(frame))
    # The banding left in the output shows as extra spread of the row means.
    row_spread = lambda image: float(np.std(image[:, :, 0].astype(float).mean(axis=1) - ramp.mean(axis=1)))
    assert row_spread(corrected) < 0.5 * row_spread(kept)
