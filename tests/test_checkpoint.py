"""Checkpoints: round trip, run folders, clear errors, and no code from a checkpoint ever runs."""
from __future__ import annotations

import os

import pytest
import torch

from grainwright.inference.common.errors import InputError
from grainwright.models.checkpoint import (
    FORMAT_VERSION,
    RunFolder,
    data_fingerprint,
    load_checkpoint,
    model_from_checkpoint,
    new_checkpoint,
    resolve_checkpoint,
    save_checkpoint,
)

NORMALIZATION = {"dtype": "uint16", "bit_depth": 12, "low": 0.0, "high": 4095.0, "channels": 1}


def _payload(**overrides):
    payload = new_checkpoint("residual", 1, NORMALIZATION, hyper={"depth": 3, "width": 4}, scheme="supervised")
    payload.update(overrides)
    return payload


def test_round_trip_keeps_weights_and_descriptions(tmp_path):
    payload = _payload(training_summary={"steps": 10}, data_fingerprint="sha256:x")
    path = save_checkpoint(tmp_path / "a" / "model.pt", payload)
    loaded = load_checkpoint(path)
    assert loaded["architecture"] == "residual" and loaded["hyper"]["depth"] == 3
    assert loaded["normalization"] == NORMALIZATION and loaded["scheme"] == "supervised"
    assert loaded["training_summary"] == {"steps": 10}
    model = model_from_checkpoint(loaded)
    for key, value in payload["state_dict"].items():
        assert torch.equal(model.state_dict()[key], value)
    assert [p.name for p in path.parent.iterdir()] == ["model.pt"]  # no temporary file left behind


def test_new_checkpoints_are_seeded():
    first, second, other = _payload(), _payload(), new_checkpoint("residual", 1, NORMALIZATION, hyper={"depth": 3, "width": 4}, seed=1)
    assert all(torch.equal(first["state_dict"][k], second["state_dict"][k]) for k in first["state_dict"])
    assert not all(torch.equal(first["state_dict"][k], other["state_dict"][k]) for k in first["state_dict"])


def test_a_crafted_pickle_payload_is_refused_and_its_code_never_runs(tmp_path):
    marker = tmp_path / "code-ran"

    class Payload:  # unpickling this calls os.mkdir(marker): code stored in the file
        def __reduce__(self):
            return (os.mkdir, (str(marker),))

    crafted = _payload(training_summary=Payload())
    path = tmp_path / "crafted.pt"
    torch.save(crafted, path)
    with pytest.raises(InputError, match="refused: not plain data"):
        load_checkpoint(path)
    assert not marker.exists()
    # Control: an unrestricted unpickler does run it, so the refusal above is what protected us.
    torch.load(path, weights_only=False)
    assert marker.exists()


def test_run_folder_resolves_to_its_best_checkpoint(tmp_path):
    run = RunFolder(tmp_path / "run")
    save_checkpoint(run.last, _payload(step=5))
    with pytest.raises(InputError, match="best.pt is missing.*last.pt exists"):
        resolve_checkpoint(run.root)
    save_checkpoint(run.best, _payload())
    assert resolve_checkpoint(run.root) == run.best
    assert load_checkpoint(run.root)["architecture"] == "residual"
    assert (run.config.name, run.noise.name, run.summary.name) == ("config.toml", "noise.toml", "training-summary.json")


def test_bad_inputs_get_clear_errors(tmp_path):
    with pytest.raises(InputError, match="no such checkpoint"):
        load_checkpoint(tmp_path / "missing.pt")
    newer = save_checkpoint(tmp_path / "newer.pt", _payload(format_version=FORMAT_VERSION + 1))
    with pytest.raises(InputError, match="newer than this grainwright"):
        load_checkpoint(newer)
    unknown = save_checkpoint(tmp_path / "unknown.pt", _payload(architecture="residul"))
    with pytest.raises(InputError, match="did you mean 'residual'"):
        load_checkpoint(unknown)
    foreign = tmp_path / "foreign.pt"
    torch.save({"weights": torch.zeros(3)}, foreign)
    with pytest.raises(InputError, match="not a grainwright checkpoint"):
        load_checkpoint(foreign)
    garbage = tmp_path / "garbage.pt"
    garbage.write_bytes(b"not a checkpoint at all")
    with pytest.raises(InputError, match="garbage.pt: not a checkpoint: a text file"):
        load_checkpoint(garbage)
    mismatched = _payload()
    mismatched["hyper"] = {"depth": 4, "width": 4}
    with pytest.raises(InputError, match="do not fit"):
        model_from_checkpoint(mismatched)


def test_data_fingerprint_depends_on_names_and_sizes_not_order(tmp_path):
    a, b = tmp_path / "a.png", tmp_path / "b.png"
    a.write_bytes(b"1")
    b.write_bytes(b"22")
    first = data_fingerprint([a, b])
    assert first == data_fingerprint([b, a]) and first.startswith("sha256:")
    b.write_bytes(b"333")
    assert data_fingerprint([a, b]) != first


def test_text_empty_and_damaged_files_are_told_apart_from_stored_code(tmp_path):
    """A text file, an empty file, random bytes and a truncated checkpoint are 'not a checkpoint / damaged';
    only a pickle that imports something (here a text-looking protocol-0 pickle calling os.system) is 'code'."""
    cases = {
        "notes.txt": (b'model = "unet"\nweights = [1, 2, 3]\n', "not a checkpoint: a text file"),
        "empty.pt": (b"", "is empty, not a checkpoint"),
        "noise.pt": (bytes(range(255, 127, -1)) * 2,
                     "not a checkpoint: an unknown binary format"),
        "code.pt": (b'cos\nsystem\n(S"echo never"\ntR.', "refused: not plain data, loading it would run code"),
    }
    whole = save_checkpoint(tmp_path / "whole.pt", _payload()).read_bytes()
    cases["truncated.pt"] = (whole[: len(whole) // 2], "damaged or truncated checkpoint")
    for name, (content, message) in cases.items():
        (tmp_path / name).write_bytes(content)
        with pytest.raises(InputError, match=f"{name}: {message}") as caught:
            load_checkpoint(tmp_path / name)
        assert "\n" not in str(caught.value)
        if name != "code.pt":
            assert "code" not in str(caught.value)
