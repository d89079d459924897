"""The one atomic writer: temporary names, file modes, stale leftovers, failure leaves the old file."""
from __future__ import annotations

import os
import stat
import subprocess
import sys

import numpy as np
import pytest

from grainwright.inference.common import atomic
from grainwright.inference.common.atomic import (
    atomic_folder,
    atomic_path,
    is_temporary,
    remove_stale_temporaries,
    write_bytes_atomic,
    write_json_atomic,
)
from grainwright.inference.images.imageio import find_images, write_image


def test_outputs_get_the_mode_of_a_normal_write(tmp_path):
    # A normal open(..., "w") gives 0666 minus the umask; mkstemp would give 0600.
    old = os.umask(0o022)
    try:
        write_bytes_atomic(tmp_path / "a.bin", b"x")
        write_image(tmp_path / "b.png", np.zeros((4, 4), np.uint8))
        with open(tmp_path / "reference", "w"):
            pass
    finally:
        os.umask(old)
    expected = stat.S_IMODE(os.stat(tmp_path / "reference").st_mode)
    assert expected == 0o644
    for name in ("a.bin", "b.png"):
        assert stat.S_IMODE(os.stat(tmp_path / name).st_mode) == expected


def test_failure_keeps_the_old_file_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "out.json"
    write_json_atomic(target, {"v": 1})
    with pytest.raises(RuntimeError):
        with atomic_path(target) as temporary:
            temporary.write_text("half")
            raise RuntimeError("killed")
    assert target.read_text() == '{\n  "v": 1\n}\n'
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.json"]


def test_temporary_names_say_whose_they_are(tmp_path):
    name = atomic.temporary_name(tmp_path / "frame03.png")
    assert is_temporary(name) and name.name.startswith(".frame03.png.gw-tmp.")
    assert str(os.getpid()) in name.name
    assert not is_temporary(tmp_path / "frame03.png")


def _dead_pid() -> int:
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    return int(child.stdout)


def test_only_stale_temporaries_of_this_host_are_removed(tmp_path):
    host = atomic._host()
    dead = tmp_path / f".a.png.gw-tmp.{host}.{_dead_pid()}.0011"
    live = tmp_path / f".b.png.gw-tmp.{host}.{os.getppid()}.0022"
    other_host = tmp_path / f".c.png.gw-tmp.elsewhere.{_dead_pid()}.0033"
    foreign = tmp_path / ".d.png.partial"
    for path in (dead, live, other_host, foreign):
        path.write_bytes(b"")
    removed = remove_stale_temporaries(tmp_path)
    assert removed == [dead]
    assert live.exists() and other_host.exists() and foreign.exists()


def test_folder_scans_skip_temporaries(tmp_path):
    write_image(tmp_path / "frame.png", np.zeros((4, 4), np.uint8))
    (tmp_path / f".frame2.png.gw-tmp.{atomic._host()}.1.ab").write_bytes(b"")
    assert [p.name for p in find_images(tmp_path)] == ["frame.png"]


def test_folders_get_the_mode_of_a_normal_mkdir(tmp_path):
    # os.mkdir(path, 0o777) is what a plain mkdir does: 0777 minus the umask (mkdtemp would give 0700).
    old = os.umask(0o022)
    try:
        with atomic_folder(tmp_path / "run") as temporary:
            assert is_temporary(temporary) and temporary.parent == tmp_path
            (temporary / "config.toml").write_text("x")
        (tmp_path / "reference").mkdir()
    finally:
        os.umask(old)
    expected = stat.S_IMODE(os.stat(tmp_path / "reference").st_mode)
    assert expected == 0o755
    assert stat.S_IMODE(os.stat(tmp_path / "run").st_mode) == expected
    assert (tmp_path / "run" / "config.toml").read_text() == "x"


def test_a_failed_folder_leaves_nothing(tmp_path):
    (tmp_path / "run").mkdir()  # an empty folder given as the target stays as it was
    with pytest.raises(RuntimeError):
        with atomic_folder(tmp_path / "run") as temporary:
            (temporary / "config.toml").write_text("x")
            raise RuntimeError("stop")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]
    assert not any((tmp_path / "run").iterdir())


def test_a_folder_with_content_is_replaced_only_when_asked(tmp_path):
    (tmp_path / "report").mkdir()
    (tmp_path / "report" / "old.txt").write_text("old")
    with pytest.raises(OSError):
        with atomic_folder(tmp_path / "report") as temporary:
            (temporary / "new.txt").write_text("new")
    assert [p.name for p in (tmp_path / "report").iterdir()] == ["old.txt"]
    with atomic_folder(tmp_path / "report", replace_existing=True) as temporary:
        (temporary / "new.txt").write_text("new")
    assert [p.name for p in (tmp_path / "report").iterdir()] == ["new.txt"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]  # the retired folder is gone
