"""Every file and folder the commands write gets the mode a plain write would (0666 / 0777 minus the umask), so
another account on a plant machine can read the outputs; and each command's next run clears the stale
temporaries a killed run left where it writes (run folders, checkpoints, the export folder)."""
from __future__ import annotations

import os
import stat
from pathlib import Path

import pytest
from test_leftovers import Writer
from test_trainer import TINY, _noisy_folder, _quiet

from grainwright.console.cli import main
from grainwright.trainer.run import train_command

UMASK = 0o002  # neither the old 0600 of temporary files nor the usual 0644, so both mistakes show


def _modes(*roots: Path) -> dict[str, int]:
    found = {}
    for root in roots:
        paths = [root] + (sorted(root.rglob("*")) if root.is_dir() else [])
        for path in paths:
            found[str(path)] = stat.S_IMODE(path.stat().st_mode)
    return found


@pytest.mark.slow
def test_outputs_of_every_command_get_the_umask_mode_and_stale_leftovers_go(tmp_path, capsys):
    data = _noisy_folder(tmp_path / "data")
    runs, models = tmp_path / "runs", tmp_path / "models"
    previous = os.umask(UMASK)
    try:
        killed_run = Writer(runs / "first", kind="folder").kill()  # a run killed while creating its folder
        summary, run = train_command(None, str(data), scheme="neighbor2neighbor", steps=8, out=str(runs / "first"),
                                     announce=_quiet, assignments=TINY, interrupt_at_step=4)
        assert not killed_run.exists()
        killed_checkpoint = Writer(run.last).kill()  # killed while saving a checkpoint
        summary, run = train_command(None, None, resume=str(run.root), announce=_quiet)
        assert summary["steps"] == 8 and not killed_checkpoint.exists()

        killed_export = Writer(models / "model.onnx").kill()
        assert main(["export", str(run.root), "-o", str(models / "model.onnx"), "--threads", "1"]) == 0
        assert not killed_export.exists()
        assert main(["denoise", str(models / "model.onnx"), str(data / "noisy"), "-o", str(tmp_path / "out"), "-q",
                     "--threads", "1"]) == 0
        assert main(["compare", "--noisy", str(data / "noisy"), "--methods", f"mean,{models / 'model.onnx'}",
                     "-o", str(tmp_path / "report"), "--quick", "--threads", "1"]) == 0
        assert main(["inspect", str(data / "noisy"), "--save-noise", str(tmp_path / "noise.toml")]) == 0
    finally:
        os.umask(previous)
    capsys.readouterr()
    modes = _modes(run.root, models, tmp_path / "out", tmp_path / "report", tmp_path / "noise.toml")
    files = {path: mode for path, mode in modes.items() if Path(path).is_file()}
    folders = {path: mode for path, mode in modes.items() if Path(path).is_dir()}
    kinds = {Path(path).suffix for path in files}
    assert {".pt", ".toml", ".json", ".onnx", ".png", ".html", ".csv"} <= kinds, kinds  # every kind was seen
    assert {path: oct(mode) for path, mode in files.items() if mode != 0o666 & ~UMASK} == {}
    assert {path: oct(mode) for path, mode in folders.items() if mode != 0o777 & ~UMASK} == {}
