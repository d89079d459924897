"""Per-file faults: one classification, one line naming the file and the reason, the batch policy per kind."""
from __future__ import annotations

import errno
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from onnxruntime.capi.onnxruntime_pybind11_state import Fail
from test_runner import build_conv_model

from grainwright.console.cli import main
from grainwright.inference.common.atomic import is_temporary
from grainwright.inference.images import imageio
from grainwright.inference.images.imageio import write_image
from grainwright.inference.runtime import batch as batch_module
from grainwright.inference.runtime.batch import Job, denoise_file, expected_record
from grainwright.inference.runtime.faults import FaultKind, model_fault, write_fault
from grainwright.inference.runtime.runner import OnnxDenoiser


@pytest.fixture
def frames(tmp_path: Path) -> dict[str, Path]:
    rng = np.random.default_rng(1)
    inputs = tmp_path / "in"
    for index in range(4):
        write_image(inputs / f"f{index}.png", rng.integers(0, 1000, (40, 48, 1)).astype(np.uint16))
    return {"model": build_conv_model(tmp_path / "m.onnx"), "in": inputs, "out": tmp_path / "out"}


def _run(*argv: object) -> int:
    return main(["denoise", *map(str, argv), "-q", "--threads", "1"])


def _failing_write(failing_call: int, error: OSError):
    calls = {"n": 0}
    original = imageio._write_png

    def write_png(path, temporary, data, text):
        calls["n"] += 1
        if calls["n"] >= failing_call:
            raise error
        return original(path, temporary, data, text)

    return write_png


@pytest.mark.parametrize("error", [OSError(errno.ENOSPC, "No space left on device"),
                                   OSError("1048576 requested and 1043792 written")])  # numpy's short write
def test_a_full_disk_stops_the_batch_with_one_line(frames, monkeypatch, capsys, error):
    monkeypatch.setattr(imageio, "_write_png", _failing_write(3, error))
    assert _run(frames["model"], frames["in"], "-o", frames["out"]) == 1
    captured = capsys.readouterr()
    assert "done 2, skipped 0, failed 1" in captured.out  # the fourth file is not attempted
    failures = [line for line in captured.err.splitlines() if line.startswith("failed:")]
    assert len(failures) == 1 and "f2.png" in failures[0] and "no space left" in failures[0]
    assert "stopped early (no-space)" in captured.err and "Traceback" not in captured.err
    assert sorted(p.name for p in frames["out"].iterdir()) == ["f0.png", "f1.png"]  # no partial, no temporary
    # space returns: the rerun skips what was done and finishes the rest
    monkeypatch.undo()
    assert _run(frames["model"], frames["in"], "-o", frames["out"]) == 0
    assert "done 2, skipped 2, failed 0" in capsys.readouterr().out


def test_a_read_only_folder_stops_but_a_permission_fault_goes_on(frames, monkeypatch, capsys):
    monkeypatch.setattr(imageio, "_write_png", _failing_write(1, OSError(errno.EROFS, "Read-only file system")))
    assert _run(frames["model"], frames["in"], "-o", frames["out"]) == 1
    assert "done 0, skipped 0, failed 1" in capsys.readouterr().out
    monkeypatch.setattr(imageio, "_write_png", _failing_write(1, OSError(errno.EACCES, "Permission denied")))
    assert _run(frames["model"], frames["in"], "-o", frames["out"]) == 1
    captured = capsys.readouterr()
    assert "done 0, skipped 0, failed 4" in captured.out and "Permission denied" in captured.err


def test_a_model_failure_names_the_file_and_the_batch_goes_on(frames, monkeypatch, capsys):
    original = OnnxDenoiser.infer
    calls = {"n": 0}

    def fails_once(self, windows, sigma=None):
        calls["n"] += 1
        if calls["n"] == 1:
            raise Fail("[ONNXRuntimeError] : 1 : FAIL : Non-zero status code returned while running Conv node.\n"
                       "second line of the runtime's text")
        return original(self, windows, sigma)

    monkeypatch.setattr(OnnxDenoiser, "infer", fails_once)
    assert _run(frames["model"], frames["in"], "-o", frames["out"]) == 1
    captured = capsys.readouterr()
    assert "done 3, skipped 0, failed 1" in captured.out
    failure = [line for line in captured.err.splitlines() if line.startswith("failed:")]
    assert len(failure) == 1 and "f0.png" in failure[0] and "the model failed on this image" in failure[0]
    assert "second line" not in captured.err


def test_the_engine_returns_faults_instead_of_raising(frames):
    denoiser = OnnxDenoiser(frames["model"], threads=1)
    expected = expected_record(denoiser)
    (frames["in"] / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n truncated")
    result = denoise_file(denoiser, Job(frames["in"] / "broken.png", frames["out"] / "broken.png"), expected)
    assert result.status == "failed" and result.fault.kind is FaultKind.INPUT
    assert str(result.fault).startswith(str(frames["in"] / "broken.png") + ": ")
    done = denoise_file(denoiser, Job(frames["in"] / "f0.png", frames["out"] / "f0.png"), expected, durable=True,
                        extra_record={"worker": "w1"})
    assert done.status == "done" and done.fault is None
    assert batch_module.read_record(frames["out"] / "f0.png")["worker"] == "w1"


def test_classification_by_operating_system_reason(tmp_path):
    out = tmp_path / "x.png"
    assert write_fault(OSError(errno.EDQUOT, "Disk quota exceeded"), out).kind is FaultKind.NO_SPACE
    assert write_fault(OSError(errno.EIO, "Input/output error"), out).kind is FaultKind.WRITE
    assert write_fault(MemoryError(), out).kind is FaultKind.MEMORY
    assert model_fault(MemoryError(), out).kind is FaultKind.MEMORY
    assert "\n" not in str(write_fault(OSError(errno.EIO, "two\nlines"), out))


def _mount_tmpfs(folder: Path, size: str) -> bool:
    if os.geteuid() != 0 or shutil.which("mount") is None:
        return False
    folder.mkdir()
    return subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)],
                          capture_output=True).returncode == 0


def test_a_real_full_filesystem(tmp_path, capsys):
    # A 256 KiB tmpfs holds a few of these 300 KB float32 TIFF outputs, not all twelve.
    small = tmp_path / "small"
    if not _mount_tmpfs(small, "1m"):
        pytest.skip("cannot mount a small tmpfs here (needs root and mount); the simulated ENOSPC tests cover it")
    try:
        rng = np.random.default_rng(2)
        inputs = tmp_path / "in"
        for index in range(12):
            write_image(inputs / f"g{index:02d}.tif", rng.uniform(0, 1000, (256, 300, 1)).astype(np.float32))
        model = build_conv_model(tmp_path / "m.onnx")
        assert _run(model, inputs, "-o", small) == 1
        captured = capsys.readouterr()
        assert "no space left" in captured.err and "Traceback" not in captured.err
        written = list(small.iterdir())
        assert written and not any(is_temporary(p) for p in written)
        for path in written:
            assert imageio.read_frames(path).shape == (1, 256, 300, 1)  # every output left is whole
    finally:
        subprocess.run(["umount", str(small)], capture_output=True)


def _without_declared_channels(model: Path) -> Path:
    import onnx

    graph = onnx.load(str(model))
    graph.graph.input[0].type.tensor_type.shape.dim[1].dim_param = "C"
    onnx.save(graph, str(model))
    return model


@pytest.mark.parametrize("declared", [True, False])
def test_an_rgb_image_into_a_grey_model_without_metadata_gets_one_line(tmp_path, capsys, declared):
    # A hand-made model without grainwright metadata, run with --receptive-field: with the channel count fixed
    # in its graph the image is refused before running; with a symbolic one ONNX Runtime's failure is named once.
    model = build_conv_model(tmp_path / "bare.onnx", metadata=False)
    if not declared:
        _without_declared_channels(model)
    rng = np.random.default_rng(5)
    write_image(tmp_path / "in" / "colour.png", rng.integers(0, 1000, (40, 48, 3)).astype(np.uint16))
    write_image(tmp_path / "in" / "grey.png", rng.integers(0, 1000, (40, 48, 1)).astype(np.uint16))
    code = subprocess.run([sys.executable, "-m", "grainwright.console.cli", "denoise", str(model),
                           str(tmp_path / "in"), "-o", str(tmp_path / "out"), "--receptive-field", "9", "-q",
                           "--threads", "1"], capture_output=True, text=True)
    assert code.returncode == 1 and "done 1, skipped 0, failed 1" in code.stdout
    assert code.stderr.count("\n") == 1 and "Traceback" not in code.stderr, code.stderr  # one line, nothing else
    assert code.stderr.startswith(f"failed: {tmp_path / 'in' / 'colour.png'}: ")
    if declared:
        assert "image has 3 channel(s), the model bare.onnx takes 1" in code.stderr
    else:
        assert "the model failed on this image" in code.stderr
    assert (tmp_path / "out" / "grey.png").exists()

