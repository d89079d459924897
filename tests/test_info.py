"""``grainwright info`` and ``read_model_metadata``: torch-free, clear about files that are not ours."""
from __future__ import annotations

import json
import subprocess
import sys

import onnx
import pytest
from onnx import TensorProto, helper

from grainwright.inference.common.errors import InputError
from grainwright.inference.images.normalization import Normalization
from grainwright.inference.runtime.modelinfo import read_model_metadata, render_metadata
from grainwright.models.checkpoint import new_checkpoint, save_checkpoint
from grainwright.models.export import export_checkpoint

BLOCK_TORCH = "import sys; sys.modules['torch'] = None\n"


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    folder = tmp_path_factory.mktemp("info")
    normalization = Normalization("uint8", 8, 0.0, 255.0, 3, "rgb").with_anscombe(0.01, 0.004)
    payload = new_checkpoint("unet-small", 3, normalization, hyper={"levels": 2, "width": 4}, scheme="recorrupted",
                             data_fingerprint="sha256:abc", training_summary={"steps": 12, "best_psnr": 30.5})
    source = save_checkpoint(folder / "best.pt", payload)
    return export_checkpoint(source, folder / "model.onnx").path


def _plain_onnx(path, metadata=None):
    """A valid ONNX identity model from elsewhere, optionally with a given 'grainwright' entry."""
    graph = helper.make_graph([helper.make_node("Identity", ["image"], ["denoised"])], "plain",
                              [helper.make_tensor_value_info("image", TensorProto.FLOAT, [1, 1, 4, 4])],
                              [helper.make_tensor_value_info("denoised", TensorProto.FLOAT, [1, 1, 4, 4])])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    if metadata is not None:
        model.metadata_props.add(key="grainwright", value=metadata)
    onnx.save(model, path)
    return path


def test_info_runs_with_torch_blocked(exported):
    script = BLOCK_TORCH + f"from grainwright.console.cli import main\nsys.exit(main(['info', {str(exported)!r}]))\n"
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    for expected in ("unet-small", "receptive field", "alignment         4 px", "anscombe", "recorrupted",
                     "sha256:abc", "steps=12", "tiling rule", "parity", "caution"):
        assert expected in result.stdout, expected


def test_info_json_is_the_stored_document(exported, capsys):
    from grainwright.console.cli import main

    assert main(["info", str(exported), "--json"]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed == read_model_metadata(exported)
    assert printed["channels"] == 3 and printed["normalization"]["channel_order"] == "rgb"


def test_render_is_readable_without_optional_fields():
    text = render_metadata({"format": "grainwright-model", "format_version": 1, "architecture": {"name": "residual"}})
    assert "residual" in text and "receptive field" in text


def test_files_that_are_not_grainwright_models(tmp_path):
    with pytest.raises(InputError, match="no such model file"):
        read_model_metadata(tmp_path / "missing.onnx")
    garbage = tmp_path / "garbage.onnx"
    garbage.write_bytes(b"\x00not onnx at all")
    with pytest.raises(InputError, match="garbage.onnx: not a readable ONNX model"):
        read_model_metadata(garbage)
    with pytest.raises(InputError, match="has no 'grainwright' metadata"):
        read_model_metadata(_plain_onnx(tmp_path / "plain.onnx"))
    with pytest.raises(InputError, match="not valid JSON"):
        read_model_metadata(_plain_onnx(tmp_path / "bad.onnx", "{oops"))
    newer = json.dumps({"format": "grainwright-model", "format_version": 99})
    with pytest.raises(InputError, match="format version 99 is newer"):
        read_model_metadata(_plain_onnx(tmp_path / "newer.onnx", newer))
    with pytest.raises(InputError, match="not a grainwright model description"):
        read_model_metadata(_plain_onnx(tmp_path / "other.onnx", json.dumps({"format": "else"})))
