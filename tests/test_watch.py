"""The line service (``grainwright watch``): arrivals, quarantine, exactly-once after kill -9, full disks, signals.

Every loop here is bounded by a count of service steps or by a deadline that only fails the test; nothing
asserts a duration. Frames are small generated arrays; the model is the tiny conv stack of test_runner.
"""
from __future__ import annotations

import errno
import json
import os
import shutil
import signal
import statistics
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from test_faults import _mount_tmpfs
from test_runner import build_conv_model

from grainwright.console.cli import main
from grainwright.inference.common import atomic
from grainwright.inference.common.atomic import is_temporary
from grainwright.inference.images import imageio
from grainwright.inference.images.imageio import read_frames, write_image
from grainwright.inference.runtime.batch import read_record
from grainwright.inference.runtime.frame_engine import FrameEngine
from grainwright.inference.runtime.line_arrivals import ArrivalWatcher
from grainwright.inference.runtime.line_journal import JOURNAL_NAME, Journal, replay
from grainwright.inference.runtime.line_service import FolderHeld, LineService, LineSettings, move_durably
from grainwright.inference.runtime.line_status import STATUS_NAME, LatencyWindow

ROOT = Path(__file__).resolve().parents[1]


class FakeClock:
    def __init__(self, start: float = 1_000_000.0):
        self.now = start

    def __call__(self) -> float:
        return self.now


def _frame(seed: int, shape=(40, 48, 1)) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 1000, shape).astype(np.uint16)


def _drop(folder: Path, name: str, array: np.ndarray) -> Path:
    """Write a frame under a name the patterns ignore, then rename it in (the 'renamed' arrival rule)."""
    staging = write_image(folder.parent / "staging" / name, array)
    os.replace(staging, folder / f"{name}.part")
    os.replace(folder / f"{name}.part", folder / name)
    return folder / name


def _service(tmp_path: Path, model: Path, logs: list[str] | None = None, clock=time.time, **options) -> LineService:
    settings = LineSettings(watch=tmp_path / "in", out_dir=tmp_path / "out", poll=0.01, retry_wait=0.01,
                            status_every=0.05, backoff_max=0.05, **options)
    logs = logs if logs is not None else []
    return LineService(lambda: FrameEngine(model, threads=1), settings, log=logs.append, clock=clock)


def _drive(service: LineService, until, steps: int = 3000) -> None:
    """Step an opened service until ``until()`` holds; bounded by a step count."""
    for _ in range(steps):
        service.step()
        if until():
            return
    pytest.fail(f"the service did not get there in {steps} steps: {service.status()}")


def _journal(out: Path) -> list[dict]:
    return [json.loads(line) for line in (out / JOURNAL_NAME).read_text().splitlines()]


def _done_names(out: Path) -> list[str]:
    return [entry["input"] for entry in _journal(out) if entry["event"] == "done"]


def _batch_reference(model: Path, sources: Path, out: Path, *options: str) -> Path:
    assert main(["denoise", str(model), str(sources), "-o", str(out), "-q", "--threads", "1", *options]) == 0
    return out


@pytest.fixture
def model(tmp_path: Path) -> Path:
    return build_conv_model(tmp_path / "m.onnx")


@pytest.fixture
def folders(tmp_path: Path) -> Path:
    (tmp_path / "in").mkdir()
    return tmp_path


# -- arrivals -----------------------------------------------------------------------------------------------------

def test_a_frame_written_slowly_in_pieces_is_not_read_before_it_is_complete(folders, model):
    clock = FakeClock()
    service = _service(folders, model, clock=clock, arrival="stable", settle=2.0)
    service.open()
    encoded = (folders / "whole.png")
    write_image(encoded, _frame(1))
    data = encoded.read_bytes()
    encoded.unlink()
    target = folders / "in" / "slow.png"
    pieces = np.array_split(np.frombuffer(data, np.uint8), 4)
    with open(target, "wb") as writer:
        for piece in pieces:  # each piece lands 1.5 s (fake) after the last: less than the settle time
            writer.write(piece.tobytes())
            writer.flush()
            os.utime(target, ns=(int(clock.now * 1e9),) * 2)
            for _ in range(3):
                service.step()
            assert service.counters.done == 0 and service.counters.failed_attempts == 0
            assert not (folders / "out" / "slow.png").exists()
            clock.now += 1.5
    clock.now += 2.5  # complete and unchanged for longer than the settle time
    _drive(service, lambda: service.counters.done == 1, steps=50)
    service.close()
    assert service.counters.failed_attempts == 0  # never read while incomplete
    reference = _batch_reference(model, _copy_of(folders, target), folders / "ref")
    np.testing.assert_array_equal(read_frames(folders / "out" / "slow.png"), read_frames(reference / "slow.png"))


def _copy_of(tmp_path: Path, source: Path) -> Path:
    folder = tmp_path / "copies"
    folder.mkdir(exist_ok=True)
    shutil.copyfile(source, folder / source.name)
    return folder


def test_the_stable_rule_unit_waits_for_size_and_time_to_settle(tmp_path):
    clock = FakeClock()
    watcher = ArrivalWatcher(tmp_path, ["*.tif"], "stable", settle=1.0, clock=clock)
    path = tmp_path / "a.tif"
    path.write_bytes(b"x")
    assert watcher.scan() == []
    clock.now += 0.6
    path.write_bytes(b"xy")  # grew: the clock starts again
    assert watcher.scan() == []
    clock.now += 0.6
    assert watcher.scan() == []
    clock.now += 0.5
    assert [a.name for a in watcher.scan()] == ["a.tif"]
    (tmp_path / "empty.tif").write_bytes(b"")
    clock.now += 5
    assert [a.name for a in watcher.scan()] == ["a.tif"]  # an empty file has not arrived


def test_a_frame_renamed_in_is_taken_at_once(folders, model):
    clock = FakeClock()
    service = _service(folders, model, clock=clock)  # 'renamed' rule, the default
    service.open()
    staging = write_image(folders / "staging" / "f0.png", _frame(2))
    os.replace(staging, folders / "in" / "f0.png.part")
    staging = folders / "in" / "f0.png.part"
    hidden = write_image(folders / "in" / ".f1.png", _frame(3))
    for _ in range(3):
        clock.now += service.settings.poll
        service.step()
    assert service.counters.done == 0 and not service.queue  # neither the staging nor the hidden name is a frame
    os.replace(staging, folders / "in" / "f0.png")
    clock.now += service.settings.poll  # the next scan, and no settle time: taken in the same step
    service.step()
    assert service.counters.done == 1
    service.close()
    assert _done_names(folders / "out") == ["f0.png"] and hidden.exists()


# -- faults on the input side ---------------------------------------------------------------------------------------

def test_a_corrupt_frame_is_quarantined_with_its_reason_and_the_next_one_is_done(folders, model):
    logs: list[str] = []
    service = _service(folders, model, logs, inputs="move", retries=2)
    service.open()
    _drop(folders / "in", "bad.png", _frame(4))
    (folders / "in" / "bad.png").write_bytes(b"\x89PNG\r\n\x1a\n truncated")
    _drop(folders / "in", "good.png", _frame(5))
    _drive(service, lambda: service.counters.done == 1 and service.counters.quarantined == 1)
    service.close()
    quarantine = folders / "in" / "quarantine"
    assert sorted(p.name for p in quarantine.iterdir()) == ["bad.png", "bad.png.reason.txt"]
    reason = (quarantine / "bad.png.reason.txt").read_text()
    assert reason.count("\n") == 1 and reason.startswith("bad.png: ") and "corrupt" in reason
    assert service.counters.failed_attempts == 3  # the first attempt and two retries
    assert (folders / "out" / "good.png").exists() and (folders / "in" / "done" / "good.png").exists()
    assert not (folders / "out" / "bad.png").exists()
    assert any("quarantined" in line and "bad.png" in line for line in logs)


def test_with_inputs_kept_a_quarantined_frame_is_recorded_and_stays(folders, model):
    service = _service(folders, model, retries=0)
    service.open()
    (folders / "in" / "bad.tif").write_bytes(b"II*\x00garbage")
    _drive(service, lambda: service.counters.quarantined == 1)
    for _ in range(5):
        service.step()
    service.close()
    assert (folders / "in" / "bad.tif").exists() and (folders / "in" / "quarantine" / "bad.tif.reason.txt").exists()
    assert service.counters.quarantined == 1 and service.counters.failed_attempts == 1  # not retried again


# -- exactly once ---------------------------------------------------------------------------------------------------

def test_kill_9_in_the_middle_of_a_burst_then_restart_does_every_frame_exactly_once(folders, model):
    sources = folders / "sources"
    names = [f"frame{index:02d}.png" for index in range(12)]
    for index, name in enumerate(names):
        write_image(sources / name, _frame(100 + index, (192, 160, 1)))
    command = [sys.executable, "-m", "grainwright.console", "watch", str(model), str(folders / "in"), "-o",
               str(folders / "out"), "--threads", "1", "--ensemble", "8", "--inputs", "move", "--poll", "0.02"]
    first = subprocess.Popen(command, stderr=subprocess.PIPE, text=True)
    try:
        for name in names:
            shutil.copyfile(sources / name, folders / "in" / f"{name}.part")
            os.replace(folders / "in" / f"{name}.part", folders / "in" / name)
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            journal = folders / "out" / JOURNAL_NAME
            if journal.exists() and journal.read_text().count('"event":"done"') >= 3:
                break
            time.sleep(0.01)
        else:
            pytest.fail("the first service did not finish three frames")
        first.kill()  # SIGKILL: no handler runs, no cleanup
    finally:
        first.kill()
        first.communicate(timeout=60)
    restart = subprocess.run(command + ["--exit-when-idle", "0.5"], capture_output=True, text=True, timeout=300)
    assert restart.returncode == 0, restart.stderr
    assert "Traceback" not in restart.stderr
    out = folders / "out"
    done = _done_names(out)
    assert sorted(done) == names  # every frame exactly once in the journal, across both runs
    assert sorted(p.name for p in out.iterdir() if p.suffix == ".png") == names
    assert not [p for p in out.iterdir() if is_temporary(p)]
    assert sorted(p.name for p in (folders / "in" / "done").iterdir()) == names
    assert not [p for p in (folders / "in").iterdir() if p.is_file() and not p.name.startswith(".")]
    reference = _batch_reference(model, sources, folders / "ref", "--ensemble", "8")
    for name in names:
        record = read_record(out / name)
        assert record["settings"]["ensemble"] == 8
        # the output was made once: by the first process or by the restart, and the journal says which
        np.testing.assert_array_equal(read_frames(out / name), read_frames(reference / name))


def test_an_output_finished_just_before_a_crash_is_taken_over_not_made_again(folders, model):
    service = _service(folders, model)
    service.open()
    _drop(folders / "in", "f0.png", _frame(6))
    _drive(service, lambda: service.counters.done == 1)
    service.close()
    output = folders / "out" / "f0.png"
    made = (output.read_bytes(), output.stat().st_mtime_ns, output.stat().st_ino)
    # the process died after the output was durable but before the done line: only the start line survives
    lines = (folders / "out" / JOURNAL_NAME).read_text().splitlines()
    (folders / "out" / JOURNAL_NAME).write_text(lines[0] + "\n" + '{"event":"do')  # and a torn last line
    logs: list[str] = []
    again = _service(folders, model, logs, exit_when_idle=0.05)
    assert again.run() == 0
    assert (output.read_bytes(), output.stat().st_mtime_ns, output.stat().st_ino) == made
    entries = _journal(folders / "out")  # the torn line was cut off: every line parses
    assert [e["event"] for e in entries] == ["start", "done"] and entries[-1]["made"] is False
    assert any("unreadable line" in line for line in logs)


def test_the_journal_keeps_whole_lines_and_compacts(folders, model):
    journal = Journal(folders / "j.jsonl", compact_after=10, keep_generations=2)
    journal.open()
    journal.append({"event": "start", "input": "a.png"})
    with open(folders / "j.jsonl", "ab") as handle:
        handle.write(b'{"event":"done","inp')  # a failed append that could not be cut back
    journal.append({"event": "done", "input": "a.png", "sha256": "x"})  # cut back first, then appended whole
    state = replay((folders / "j.jsonl").read_text().splitlines())
    assert state.ignored == 0 and state.finished["a.png"]["sha256"] == "x"
    journal.compact([{"event": "done", "input": "a.png", "sha256": "x", "carried": True}])
    assert len((folders / "j.jsonl").read_text().splitlines()) == 1
    assert len((folders / "j.1.jsonl").read_text().splitlines()) == 2
    journal.close()

    # the service compacts as it goes: weeks of frames do not grow the journal without bound
    service = _service(folders, model, compact_after=12, keep_generations=1, inputs="delete")
    service.open()
    for index in range(20):
        _drop(folders / "in", f"f{index:02d}.png", _frame(200 + index))
    _drive(service, lambda: service.counters.done == 20)
    service.close()
    assert len((folders / "out" / JOURNAL_NAME).read_text().splitlines()) < 12
    assert (folders / "out" / "watch-journal.1.jsonl").exists()
    assert not (folders / "out" / "watch-journal.2.jsonl").exists()
    assert len([p for p in (folders / "out").iterdir() if p.suffix == ".png"]) == 20


def test_with_inputs_kept_a_restart_skips_what_is_done(folders, model):
    for index in range(3):
        _drop(folders / "in", f"f{index}.png", _frame(10 + index))
    first = _service(folders, model, exit_when_idle=0.05)
    assert first.run() == 0 and first.counters.done == 3
    again = _service(folders, model, exit_when_idle=0.05)
    assert again.run() == 0 and again.counters.done == 0
    assert len(_done_names(folders / "out")) == 3


# -- output faults --------------------------------------------------------------------------------------------------

def test_an_injected_full_disk_loses_nothing_and_resumes_by_itself(folders, model, monkeypatch):
    logs: list[str] = []
    original = imageio._write_png
    failures = {"left": 4}

    def full_disk(path, temporary, data, text):
        if failures["left"]:
            failures["left"] -= 1
            raise OSError(errno.ENOSPC, "No space left on device")
        return original(path, temporary, data, text)

    for index in range(4):
        _drop(folders / "in", f"f{index}.png", _frame(20 + index))
    monkeypatch.setattr(imageio, "_write_png", full_disk)
    journal_failures = {"left": 2}
    append = Journal.append

    def journal_full(self, entry, durable=False):
        if entry["event"] == "done" and journal_failures["left"]:
            journal_failures["left"] -= 1
            raise OSError(errno.ENOSPC, "No space left on device")
        return append(self, entry, durable=durable)

    monkeypatch.setattr(Journal, "append", journal_full)
    service = _service(folders, model, logs, inputs="move")
    service.open()
    blocked_seen = []
    _drive(service, lambda: blocked_seen.append(service.status()["state"]) or service.counters.done == 4)
    service.close()
    assert "output-blocked" in blocked_seen
    assert failures["left"] == 0 and journal_failures["left"] == 0
    assert sorted(_done_names(folders / "out")) == [f"f{i}.png" for i in range(4)]
    assert service.counters.quarantined == 0 and service.counters.failed_attempts == 0  # not the frames' fault
    blocked = [line for line in logs if line.startswith("output blocked")]
    assert blocked and "no space left" in blocked[0] and "\n" not in blocked[0]
    assert any("resuming" in line for line in logs)


def test_a_real_full_filesystem_then_space_returns(folders, model):
    small = folders / "small"
    if not _mount_tmpfs(small, "400k"):
        pytest.skip("cannot mount a small tmpfs here (needs root and mount); the injected ENOSPC test covers it")
    try:
        logs: list[str] = []
        settings = LineSettings(watch=folders / "in", out_dir=small / "out", poll=0.01, backoff_max=0.1,
                                status_every=0.05, inputs="move", done_dir=folders / "done")
        service = LineService(lambda: FrameEngine(model, threads=1, as_float=True, out_format="tif"), settings,
                              log=logs.append)
        rng = np.random.default_rng(3)
        names = [f"g{index:02d}.tif" for index in range(8)]
        for name in names:  # 8 float32 outputs of 120 KB do not fit in 400 KB
            _drop(folders / "in", name, rng.uniform(0, 1000, (120, 256, 1)).astype(np.float32))
        worker = threading.Thread(target=service.run)
        worker.start()
        try:
            deadline = time.monotonic() + 120
            while service.status()["state"] != "output-blocked" and time.monotonic() < deadline:
                time.sleep(0.02)
            assert service.status()["state"] == "output-blocked"
            done_while_full = service.counters.done
            assert subprocess.run(["mount", "-o", "remount,size=8m", str(small)]).returncode == 0
            while service.counters.done < len(names) and time.monotonic() < deadline:
                time.sleep(0.02)
        finally:
            service.request_stop()
            worker.join(timeout=60)
        assert done_while_full < len(names) and service.counters.done == len(names)
        assert sorted(_done_names(small / "out")) == names
        for name in names:
            assert read_frames(small / "out" / name).shape == (1, 120, 256, 1)
        assert not [p for p in (small / "out").iterdir() if is_temporary(p)]
        assert any("no space left" in line for line in logs) and any("resuming" in line for line in logs)
    finally:
        subprocess.run(["umount", str(small)], capture_output=True)


# -- signals, locks, model changes ----------------------------------------------------------------------------------

def test_sigterm_mid_frame_finishes_the_frame_and_exits_cleanly(folders, model):
    write_image(folders / "in" / "big.png", _frame(30, (768, 768, 1)))
    write_image(folders / "in" / "next.png", _frame(31))
    os.utime(folders / "in" / "next.png", (time.time() + 5,) * 2)
    command = [sys.executable, "-m", "grainwright.console", "watch", str(model), str(folders / "in"), "-o",
               str(folders / "out"), "--threads", "1", "--ensemble", "8", "--poll", "0.02"]
    process = subprocess.Popen(command, stderr=subprocess.PIPE, text=True)
    try:
        journal = folders / "out" / JOURNAL_NAME
        deadline = time.monotonic() + 120
        while not (journal.exists() and '"start"' in journal.read_text()) and time.monotonic() < deadline:
            time.sleep(0.005)
        assert journal.exists(), "the service never started a frame"
        process.send_signal(signal.SIGTERM)
        _, err = process.communicate(timeout=300)
    finally:
        process.kill()
    assert process.returncode == 0, err
    started = [e["input"] for e in _journal(folders / "out") if e["event"] == "start"]
    done = _done_names(folders / "out")
    assert started and set(started) == set(done)  # the frame in hand was finished, nothing left half-done
    assert read_frames(folders / "out" / started[0]).shape[1:3] in ((768, 768), (40, 48))
    status = json.loads((folders / "out" / STATUS_NAME).read_text())
    assert status["state"] == "stopped" and "Traceback" not in err


def test_a_stop_request_during_a_frame_lets_it_finish(folders, model, monkeypatch):
    service = _service(folders, model, exit_when_idle=5.0)
    original = FrameEngine.denoise_file

    def stop_midway(self, *args, **kwargs):
        service.request_stop()  # as the SIGTERM handler does, while the frame is in hand
        return original(self, *args, **kwargs)

    monkeypatch.setattr(FrameEngine, "denoise_file", stop_midway)
    for index in range(3):
        _drop(folders / "in", f"f{index}.png", _frame(40 + index))
    assert service.run() == 0
    assert len(_done_names(folders / "out")) == 1 and service.counters.done == 1
    assert json.loads((folders / "out" / STATUS_NAME).read_text())["state"] == "stopped"


def test_a_second_instance_names_the_holder_and_exits_3(folders, model, capsys):
    service = _service(folders, model)
    service.open()
    try:
        with pytest.raises(FolderHeld, match=f"process {os.getpid()}"):
            _service(folders, model).open()
        code = main(["watch", str(model), str(folders / "in"), "-o", str(folders / "other")])
        assert code == 3
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and f"process {os.getpid()}" in err and "watched folder" in err
    finally:
        service.close()
    again = _service(folders, model)  # released: the next instance may start
    again.open()
    again.close()


def test_a_replaced_model_is_kept_until_reloaded_and_each_output_names_its_model(folders, model):
    logs: list[str] = []
    service = _service(folders, model, logs)
    service.open()
    old_sha = service.engine.model_sha256
    _drop(folders / "in", "f0.png", _frame(50))
    _drive(service, lambda: service.counters.done == 1)
    replacement = build_conv_model(folders / "new.onnx", seed=7)
    os.replace(replacement, model)
    _drop(folders / "in", "f1.png", _frame(51))
    _drive(service, lambda: service.counters.done == 2 and service.status()["model"]["changed_on_disk"])
    for _ in range(10):
        service.step()
    assert any("changed on disk" in line for line in logs)
    service.request_reload()
    _drop(folders / "in", "f2.png", _frame(52))
    _drive(service, lambda: service.counters.done == 3)
    service.close()
    shas = [read_record(folders / "out" / f"f{i}.png")["model_sha256"] for i in range(3)]
    assert shas[0] == shas[1] == old_sha and shas[2] != old_sha
    assert [e["model_sha256"] for e in _journal(folders / "out") if e["event"] == "done"] == shas


def test_the_queue_is_bounded_and_frames_go_in_arrival_order(folders, model):
    service = _service(folders, model, queue_limit=2)
    service.open()
    names = [f"q{index}.png" for index in range(6)]
    for name in names:
        _drop(folders / "in", name, _frame(60 + len(name)))
    service._scan()
    assert len(service.queue) == 2 and service.status()["queue"] == {"in_memory": 2, "in_folder": 4, "total": 6}
    assert service.lag() >= 0
    _drive(service, lambda: service.counters.done == 6)
    service.close()
    assert _done_names(folders / "out") == names


def test_a_move_across_filesystems_is_copy_fsync_delete(tmp_path, monkeypatch):
    source = tmp_path / "a" / "f.png"
    source.parent.mkdir()
    source.write_bytes(b"frame bytes")

    replace = os.replace

    def cross_device(src, dst):  # the source is on another filesystem; the copy's own rename is not
        if Path(src) == source:
            raise OSError(errno.EXDEV, "Invalid cross-device link")
        return replace(src, dst)

    monkeypatch.setattr(atomic.os, "replace", cross_device)
    (tmp_path / "b").mkdir()
    (tmp_path / "b" / "f.png").write_bytes(b"an earlier frame of that name")
    moved = move_durably(source, tmp_path / "b" / "f.png")
    assert moved.name == "f.png.2" and moved.read_bytes() == b"frame bytes" and not source.exists()
    assert (tmp_path / "b" / "f.png").read_bytes() == b"an earlier frame of that name"


# -- reporting and the in-process engine ----------------------------------------------------------------------------

def test_latency_percentiles_match_the_standard_library():
    window = LatencyWindow(seconds=10.0)
    rng = np.random.default_rng(0)
    latencies = rng.uniform(0.1, 2.0, 200)
    for index, latency in enumerate(latencies):
        window.add(100.0 + index * 0.01, float(latency))
    figures, fps = window.summary(now=102.0, running_for=50.0)
    # reference: statistics.quantiles with method="inclusive" is the same type-7 definition (Hyndman & Fan 1996)
    cuts = statistics.quantiles(latencies.tolist(), n=100, method="inclusive")
    assert figures["p50"] == pytest.approx(cuts[49], abs=1e-4) and figures["p95"] == pytest.approx(cuts[94], abs=1e-4)
    assert figures["p99"] == pytest.approx(cuts[98], abs=1e-4) and fps == pytest.approx(200 / 10.0)
    figures, fps = window.summary(now=200.0, running_for=100.0)
    assert figures["count"] == 0 and figures["p50"] is None and fps == 0


def test_the_status_file_holds_the_documented_figures(folders, model):
    service = _service(folders, model, exit_when_idle=0.1)
    _drop(folders / "in", "f0.png", _frame(70))
    assert service.run() == 0
    status = json.loads((folders / "out" / STATUS_NAME).read_text())
    assert status["frames"]["done"] == 1 and status["queue"]["total"] == 0 and status["lag_s"] == 0
    assert status["latency_s"]["count"] == 1 and status["rss_mib"] > 0 and status["fps"] > 0
    assert set(status) >= {"state", "model", "frames", "queue", "lag_s", "latency_s", "fps", "rss_mib", "blocked"}


def test_the_in_process_engine_gives_the_batch_output(tmp_path, model):
    frame = _frame(80, (64, 72, 1))
    write_image(tmp_path / "src" / "f.png", frame)
    reference = _batch_reference(model, tmp_path / "src", tmp_path / "ref")
    engine = FrameEngine(model, threads=1)
    clean = engine.denoise(frame[:, :, 0])
    assert clean.shape == (64, 72) and clean.dtype == np.uint16
    np.testing.assert_array_equal(clean, read_frames(reference / "f.png")[0, :, :, 0])
    assert engine.model_sha256 == read_record(reference / "f.png")["model_sha256"]


def test_the_command_refuses_bad_settings_in_one_line(folders, model, capsys):
    assert main(["watch", str(model), str(folders / "missing"), "-o", str(folders / "out")]) == 2
    assert main(["watch", str(model), str(folders / "in"), "-o", str(folders / "in")]) == 2
    assert main(["watch", str(model), str(folders / "in"), "-o", str(folders / "out"), "--inputs", "move",
                 "--done-dir", str(folders / "out")]) == 2
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 3 and "watched folder not found" in err[0] and "must not be the watched folder" in err[1]
    assert "--done-dir must be a folder of its own" in err[2]


# -- the benchmark, at toy size -----------------------------------------------------------------------------------

@pytest.mark.slow
def test_the_watch_benchmark_counts_every_frame_once(tmp_path, model):
    from grainwright.benchmarks.line_service import rss_growth, run_bench

    lines: list[str] = []
    launcher = [sys.executable, "-m", "grainwright.console", "watch"]
    figures = run_bench(model, launcher, frames=4, size=32, threads=1, loads=(0.5,), seconds=1.0, log=lines.append)
    [load] = figures["load"]
    assert figures["capacity"]["service_fps"] > 0 and figures["capacity"]["bare_fps"] > 0
    assert load["dropped"] >= 1 and load["done"] == load["dropped"] and load["drained"]
    assert load["lost"] == 0 and load["duplicated"] == 0 and load["latency_s"]["p50"] >= 0
    assert figures["service_exit_code"] == 0 and any("service / bare" in line for line in lines)
    assert rss_growth([(0.0, 100.0), (300.0, 100.0), (1800.0, 104.0)]) == pytest.approx(0.04)
    assert rss_growth([(0.0, 100.0), (60.0, 101.0)]) is None


def test_a_frame_that_keeps_stopping_the_process_is_quarantined(folders, model):
    _drop(folders / "in", "poison.png", _frame(90))
    (folders / "out").mkdir()
    start = '{"event":"start","input":"poison.png","size":1,"sha256":"x"}\n'
    (folders / "out" / JOURNAL_NAME).write_text(start * 3)  # three attempts, each ended by the process dying
    logs: list[str] = []
    service = _service(folders, model, logs, retries=2, exit_when_idle=0.05)
    assert service.run() == 4  # idle, with a frame quarantined
    reason = (folders / "in" / "quarantine" / "poison.png.reason.txt").read_text()
    assert "gave up after 3 attempts" in reason and not (folders / "out" / "poison.png").exists()


def test_lag_is_logged_when_it_grows_and_when_the_queue_drains(folders, model):
    clock = FakeClock()
    logs: list[str] = []
    service = _service(folders, model, logs, clock=clock, lag_warning=5.0)
    service.open()
    for index in range(3):
        _drop(folders / "in", f"f{index}.png", _frame(95 + index))
    clock.now = time.time() + 60  # the frames arrived a minute ago by this clock
    service._scan()
    assert service.lag() > 5.0
    _drive(service, lambda: service.counters.done == 3)
    service.close()
    behind = [line for line in logs if line.startswith("falling behind")]
    assert len(behind) == 1 and "nothing is dropped" in behind[0]
    assert any(line.startswith("caught up") for line in logs)


def test_the_reload_command_signals_the_holder(folders, model, monkeypatch, capsys):
    service = _service(folders, model)
    service.open()
    received = []
    previous = signal.signal(signal.SIGHUP, lambda number, frame: received.append(number))
    try:
        assert main(["watch", str(model), str(folders / "in"), "-o", str(folders / "out"), "--reload"]) == 0
        deadline = time.monotonic() + 30
        while not received and time.monotonic() < deadline:
            time.sleep(0.01)
    finally:
        signal.signal(signal.SIGHUP, previous)
        service.close()
    assert received == [signal.SIGHUP] and f"process {os.getpid()}" in capsys.readouterr().out
    assert main(["watch", str(model), str(folders / "in"), "-o", str(folders / "out"), "--reload"]) == 2


def test_a_move_lost_after_the_done_line_is_finished_on_restart_without_redoing_the_frame(folders, model):
    service = _service(folders, model, inputs="move", exit_when_idle=0.05)
    _drop(folders / "in", "f0.png", _frame(97))
    assert service.run() == 0
    output = folders / "out" / "f0.png"
    made = output.stat().st_mtime_ns
    # the process died after its done line, before the move: the input is back in the watched folder
    os.replace(folders / "in" / "done" / "f0.png", folders / "in" / "f0.png")
    again = _service(folders, model, inputs="move", exit_when_idle=0.05)
    assert again.run() == 0
    assert again.counters.done == 0 and output.stat().st_mtime_ns == made
    assert (folders / "in" / "done" / "f0.png").exists() and not (folders / "in" / "f0.png").exists()
    assert _done_names(folders / "out") == ["f0.png"]
