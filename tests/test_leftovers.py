"""What a killed writer leaves behind: folder scans skip it, the next run of a command removes it from the folders
it writes to (only this host's, whose process is gone), and a full disk outside the per-file engine is one line."""
from __future__ import annotations

import errno
import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from test_runner import build_conv_model

from grainwright.console.cli import main
from grainwright.inference.common.atomic import TEMPORARY_MARK, final_path, is_temporary, temporary_name
from grainwright.inference.images.imageio import write_image
from grainwright.inference.runtime.faults import os_error_line

_WRITER = """
import sys, time
from grainwright.inference.common.atomic import atomic_folder, atomic_path
opener = atomic_folder if sys.argv[2] == "folder" else atomic_path
with opener(sys.argv[1]) as temporary:
    if sys.argv[2] == "file":
        open(temporary, "wb").write(b"half an image")
    print(temporary, flush=True)
    time.sleep(600)
"""


class Writer:
    """A child process in the middle of an atomic write (a file or a folder) of ``path``."""

    def __init__(self, path: Path, kind: str = "file"):
        self.process = subprocess.Popen([sys.executable, "-c", _WRITER, str(path), kind], stdout=subprocess.PIPE,
                                        text=True)
        self.temporary = Path(self.process.stdout.readline().strip())
        assert is_temporary(self.temporary) and self.temporary.exists()

    def kill(self) -> Path:
        self.process.send_signal(signal.SIGKILL)  # no clean-up code of ours runs
        self.process.wait()
        self.process.stdout.close()
        return self.temporary


@pytest.fixture
def writers():
    started: list[Writer] = []

    def start(path: Path, kind: str = "file") -> Writer:
        started.append(Writer(path, kind))
        return started[-1]

    yield start
    for writer in started:
        if writer.process.poll() is None:
            writer.kill()


def _other_host(folder: Path, name: str) -> Path:
    # a temporary of a cluster worker on another machine writing into the same shared folder
    path = folder / f".{name}{TEMPORARY_MARK}another-host.{os.getpid()}.abcd1234"
    path.write_bytes(b"")
    return path


def _frames(folder: Path, count: int = 2, channels: int = 1) -> Path:
    rng = np.random.default_rng(0)
    for index in range(count):
        write_image(folder / f"frame{index:02d}.png", rng.integers(200, 800, (64, 64, channels)).astype(np.uint16))
    return folder


def test_inspect_does_not_report_leftovers_as_broken_images(tmp_path, writers, capsys):
    folder = _frames(tmp_path / "shots")
    writers(folder / "frame03.png").kill()  # a denoise killed mid-write into this folder
    (folder / ".frame04.x7Qa.png").write_bytes(b"")  # an older version's (or another program's) temporary
    assert main(["inspect", str(folder)]) == 0
    captured = capsys.readouterr()
    assert "FAILED" not in captured.out and "error" not in captured.err, captured.err
    assert "Summary: 2 image(s)" in captured.out


def test_denoise_removes_only_stale_temporaries_from_its_output_folder(tmp_path, writers, capsys):
    inputs, out = _frames(tmp_path / "in"), tmp_path / "out"
    out.mkdir()
    stale = writers(out / "frame00.png").kill()
    live = writers(out / "frame01.png").temporary  # still writing: must not be touched
    elsewhere = _other_host(out, "frame00.png")
    user_file = out / ".notes.png"
    user_file.write_bytes(b"kept")
    model = build_conv_model(tmp_path / "m.onnx")
    assert main(["denoise", str(model), str(inputs), "-o", str(out), "-q", "--threads", "1"]) == 0
    assert "done 2" in capsys.readouterr().out
    assert not stale.exists()
    assert live.exists() and elsewhere.exists() and user_file.read_bytes() == b"kept"


def test_compare_and_inspect_remove_stale_leftovers_where_they_write(tmp_path, writers, capsys):
    reports = tmp_path / "reports"
    stale_folder = writers(reports / "today", kind="folder").kill()  # a comparison killed while writing
    inputs = _frames(tmp_path / "noisy", count=1)
    assert main(["compare", "--noisy", str(inputs), "--methods", "mean", "-o", str(reports / "today"),
                 "--quick", "--threads", "1"]) == 0
    assert not stale_folder.exists() and (reports / "today" / "index.html").is_file()
    stale_noise = writers(tmp_path / "noise.toml").kill()
    assert main(["inspect", str(inputs), "--save-noise", str(tmp_path / "noise.toml")]) == 0
    assert not stale_noise.exists() and (tmp_path / "noise.toml").is_file()
    capsys.readouterr()


def test_an_os_error_outside_the_engine_is_one_line_naming_the_final_file(tmp_path):
    temporary = temporary_name(tmp_path / "report" / "index.html")
    assert final_path(temporary) == tmp_path / "report" / "index.html"
    line = os_error_line(OSError(errno.ENOSPC, "No space left on device", str(temporary)))
    assert line == f"{tmp_path / 'report' / 'index.html'}: no space left on the device"
    assert os_error_line(OSError("1048576 requested and 1043792 written")) == "no space left on the device"
    assert os_error_line(OSError(errno.EROFS, "Read-only file system", "/x/y")) == "/x/y: Read-only file system"


def _full_tmpfs(folder: Path) -> bool:
    """Mount a 64 KiB tmpfs at ``folder`` and fill it (needs root and mount)."""
    if os.geteuid() != 0 or shutil.which("mount") is None:
        return False
    folder.mkdir()
    if subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", str(folder)],
                      capture_output=True).returncode != 0:
        return False
    with open(folder / "filler", "wb") as handle:
        try:
            handle.write(bytes(1 << 20))
            handle.flush()
        except OSError:
            pass
    return True


def test_inspect_and_compare_onto_a_full_disk_give_one_line(tmp_path, capsys):
    full = tmp_path / "full"
    if not _full_tmpfs(full):
        pytest.skip("cannot mount a small tmpfs here (needs root and mount)")
    try:
        inputs = _frames(tmp_path / "noisy", count=1)
        assert main(["inspect", str(inputs), "--save-noise", str(full / "noise.toml")]) == 1
        err = capsys.readouterr().err
        assert err.strip() == f"grainwright inspect: error: {full / 'noise.toml'}: no space left on the device"
        assert main(["compare", "--noisy", str(inputs), "--methods", "mean", "-o", str(full / "report"),
                     "--quick", "--threads", "1"]) == 1
        err = capsys.readouterr().err.strip().splitlines()
        assert err[-1].startswith("grainwright compare: error: ") and "no space left on the device" in err[-1]
        assert "Traceback" not in "\n".join(err)
        assert sorted(p.name for p in full.iterdir()) == ["filler"]  # nothing half-written left
    finally:
        subprocess.run(["umount", str(full)], capture_output=True)

