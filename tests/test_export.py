"""``grainwright export``: one self-contained ONNX file, checked against torch, with its description inside.

Outside references: ``onnx.checker`` (the ONNX specification's validator) for the file; the torch network
itself for the numbers (ONNX Runtime must reproduce it); scikit-image's sample images as calibration data.
"""
from __future__ import annotations

import json

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import tifffile
import torch
from skimage import data

import grainwright.models.export as export_module
from grainwright.console.cli import main
from grainwright.inference.common.errors import (
    ConfigError,
    GrainwrightError,
    InputError,
)
from grainwright.inference.images.normalization import Normalization
from grainwright.models.checkpoint import (
    FORMAT_VERSION,
    RunFolder,
    new_checkpoint,
    save_checkpoint,
)
from grainwright.models.export import export_checkpoint, int8_path_for, reference_output

torch.set_num_threads(1)

TWELVE_BIT = Normalization("uint16", 12, 0.0, 4095.0, 1)
TINY = {
    "residual": {"depth": 3, "width": 8},
    "residual-noisemap": {"depth": 3, "width": 8},
    "unet-small": {"levels": 2, "width": 4},
    "unet-halfres": {"levels": 2, "width": 4},
    "unet-stack": {"frames": 3, "levels": 2, "width": 4},
    "unet-noisemap": {"levels": 2, "width": 4},
}


def _checkpoint(tmp_path, name="residual", normalization=TWELVE_BIT, **hyper):
    payload = new_checkpoint(name, normalization.channels, normalization, hyper={**TINY[name], **hyper},
                             scheme="supervised", training_noise={"sigma_native": 40.0})
    return save_checkpoint(tmp_path / f"{name}.pt", payload), payload


@pytest.fixture(scope="module")
def calibration_dir(tmp_path_factory):
    """12-bit noisy frames made from scikit-image sample images (open data)."""
    folder = tmp_path_factory.mktemp("calibration")
    rng = np.random.default_rng(0)
    for name in ("camera", "moon", "coins"):
        clean = getattr(data, name)()[:96, :112].astype(np.float64) * 16.0
        noisy = np.clip(np.rint(clean + rng.normal(0.0, 40.0, clean.shape)), 0, 4095).astype(np.uint16)
        tifffile.imwrite(folder / f"{name}.tif", noisy)
    return folder


def _session(path):
    options = ort.SessionOptions()
    options.intra_op_num_threads = 1
    return ort.InferenceSession(str(path), options, providers=["CPUExecutionProvider"])


@pytest.mark.parametrize("name", sorted(TINY))
def test_export_from_random_checkpoint_is_valid_and_matches_torch(tmp_path, name):
    source, payload = _checkpoint(tmp_path, name)
    result = export_checkpoint(source, tmp_path / "model.onnx")
    proto = onnx.load(result.path)
    onnx.checker.check_model(proto, full_check=True)
    assert max(entry.version for entry in proto.opset_import if entry.domain in ("", "ai.onnx")) >= 17
    image_input = next(i for i in proto.graph.input if i.name == "image")
    dims = image_input.type.tensor_type.shape.dim
    assert [bool(d.dim_param) for d in dims] == [True, False, True, True]  # dynamic N, H, W; fixed C

    # A different batch size and image shape than the exporter's own checks, in native 12-bit values.
    model = export_module.model_from_checkpoint(payload)
    side = 4 * model.alignment
    rng = np.random.default_rng(5)
    image = rng.uniform(0, 4095, (2, model.input_channels, side, 3 * side)).astype(np.float32)
    feeds = {"image": image}
    sigma = None
    if model.takes_noise_map:
        sigma = rng.uniform(10, 80, (2, 1, side, 3 * side)).astype(np.float32)
        feeds["noise_sigma"] = sigma
    output = _session(result.path).run(["denoised"], feeds)[0]
    expected = reference_output(model, TWELVE_BIT, image, sigma)
    assert np.max(np.abs(output - expected)) / 4095.0 <= 1e-4
    assert [i.name for i in _session(result.path).get_inputs()] == list(feeds)


@pytest.mark.parametrize("kind", ["anscombe", "log", "log-noisy-targets"])
def test_variance_stabilising_transform_is_inside_the_graph(tmp_path, kind):
    normalization = {"anscombe": TWELVE_BIT.with_anscombe(0.004, 0.003), "log": TWELVE_BIT.with_log(),
                     "log-noisy-targets": TWELVE_BIT.with_log(looks=4.0, noisy_targets=True)}[kind]
    source, payload = _checkpoint(tmp_path, "residual", normalization)
    result = export_checkpoint(source, tmp_path / "model.onnx")
    ops = {node.op_type for node in onnx.load(result.path).graph.node}
    assert ("Sqrt" in ops) if kind == "anscombe" else ({"Log", "Exp"} <= ops)
    if kind == "log-noisy-targets":  # the speckle bias is removed inside the graph as in numpy
        assert result.metadata["normalization"]["transform"]["bias"] == pytest.approx(-0.1302, abs=1e-4)
    image = np.random.default_rng(1).uniform(0, 4095, (1, 1, 31, 45)).astype(np.float32)
    output = _session(result.path).run(["denoised"], {"image": image})[0]
    expected = reference_output(export_module.model_from_checkpoint(payload), normalization, image)
    assert np.max(np.abs(output - expected)) / 4095.0 <= 1e-4
    assert result.metadata["normalization"]["transform"]["kind"] == kind.removesuffix("-noisy-targets")


def test_batch_norm_is_folded_at_export(tmp_path):
    source, _ = _checkpoint(tmp_path, "residual", batch_norm=True)
    result = export_checkpoint(source, tmp_path / "model.onnx")
    ops = {node.op_type for node in onnx.load(result.path).graph.node}
    assert "BatchNormalization" not in ops and "Conv" in ops
    assert result.metadata["parity"]["random"]["max_abs_diff"] <= 1e-4


def test_metadata_carries_everything_a_runtime_needs(tmp_path, calibration_dir):
    source, payload = _checkpoint(tmp_path, "unet-small")
    result = export_checkpoint(source, tmp_path / "model.onnx", calibration=calibration_dir)
    stored = {entry.key: entry.value for entry in onnx.load(result.path).metadata_props}
    metadata = json.loads(stored["grainwright"])
    assert metadata["format"] == "grainwright-model" and metadata["format_version"] == 1
    for key in ("architecture", "parameters", "macs_per_pixel", "receptive_field", "alignment", "tile_margin",
                "tiling_rule", "channels", "normalization", "noise", "training_noise", "scheme",
                "data_fingerprint", "training_summary", "tool_version", "created", "parity", "opset"):
        assert key in metadata, key
    assert metadata["architecture"]["name"] == "unet-small" and metadata["alignment"] == 4
    assert metadata["tile_margin"] >= (metadata["receptive_field"] - 1) // 2
    assert metadata["tile_margin"] % metadata["alignment"] == 0
    assert str(metadata["tile_margin"]) in metadata["tiling_rule"]
    assert metadata["normalization"] == TWELVE_BIT.to_dict()
    assert metadata["scheme"] == "supervised" and metadata["training_noise"] == {"sigma_native": 40.0}
    assert metadata["parity"]["random"]["shape"] == [1, 1, 123, 77]  # not multiples of the alignment of 4
    assert metadata["parity"]["calibration"]["file"] == "camera.tif"
    assert metadata["parity"]["calibration"]["max_abs_diff"] <= 1e-4


def test_run_folder_exports_its_best_checkpoint(tmp_path):
    run = RunFolder(tmp_path / "run")
    best = new_checkpoint("residual", 1, TWELVE_BIT, hyper=TINY["residual"], seed=1)
    save_checkpoint(run.best, best)
    save_checkpoint(run.last, new_checkpoint("residual", 1, TWELVE_BIT, hyper={"depth": 4, "width": 8}, seed=2))
    result = export_checkpoint(run.root, tmp_path / "model.onnx")
    assert result.metadata["source_checkpoint"]["file"] == "best.pt"
    assert result.metadata["architecture"]["hyper"]["depth"] == 3


# Gamma speckle of 10 looks on float data up to 2.7 (bench train's speckle case): the trainer's log transform with
# the speckle bias removed on the way back, and the level the trainer recorded for that data.
SPECKLE_FLOAT = Normalization("float32", None, 0.0, 2.7, 1).with_log(looks=10.0, noisy_targets=True)


def test_working_domain_difference_undoes_the_log_inverse():
    # Two outputs whose log-domain values differ by exactly delta (exp(a) / exp(b) = exp(delta * scale)), far above
    # the range: the native difference is large, the working-domain one is delta (log and exp are exact inverses).
    transform, delta = SPECKLE_FLOAT.transform, 3e-6
    working = np.array([0.2, 0.9, 1.9], np.float64)  # 1.9: about 125 times the range, as in the failed export
    log_value = working * transform["scale"] + transform["offset"]
    native = (np.exp(log_value - transform["bias"]) - transform["epsilon"]) * 2.7
    shifted = (np.exp(log_value + delta * transform["scale"] - transform["bias"]) - transform["epsilon"]) * 2.7
    assert export_module.working_domain_difference(SPECKLE_FLOAT, shifted, native) == pytest.approx(delta, rel=1e-6)
    assert np.max(np.abs(shifted - native)) / 2.7 > 1e-4  # what the native measure refused
    plain = Normalization("float32", None, 0.0, 2.0, 1)  # no transform: fractions of the native range, as before
    assert export_module.working_domain_difference(plain, np.array([1.0]), np.array([1.001])) == pytest.approx(5e-4)


def test_gamma_speckle_starting_model_passes_parity_above_the_range(tmp_path):
    # The export that failed (bench train, speckle of 10 looks): the random parity image with its random noise map
    # (0.25 to 4 times the level, whatever the pixel) drives the network's log-domain output above the range, where
    # exp() turned float32 rounding into 2.4e-4 of the native range.
    from grainwright.models.starting import starting_checkpoint_for

    payload = starting_checkpoint_for(SPECKLE_FLOAT)
    payload["training_noise"] = {"sigma_native": 0.1243}
    source = save_checkpoint(tmp_path / "start.pt", payload)
    parity = export_checkpoint(source, tmp_path / "start.onnx", threads=1).metadata["parity"]
    assert parity["random"]["max_abs_diff"] <= export_module.PARITY_TOLERANCE
    assert parity["random"]["max_abs_diff_native"] > 0.0  # recorded beside it


def test_log_domain_mismatch_is_still_refused(tmp_path, monkeypatch):
    # A torch side whose log-domain bias is off by 1e-3 of the working range: refused even though the measure
    # works in the log domain (the bias does not cancel when only one side has it).
    from grainwright.models.starting import starting_checkpoint_for

    source = save_checkpoint(tmp_path / "start.pt", starting_checkpoint_for(SPECKLE_FLOAT))
    real, transform = export_module.reference_output, SPECKLE_FLOAT.transform

    def biased(*args, **kwargs):
        native = real(*args, **kwargs).astype(np.float64)
        moved = (native / 2.7 + transform["epsilon"]) * np.exp(1e-3 * transform["scale"]) - transform["epsilon"]
        return (moved * 2.7).astype(np.float32)

    monkeypatch.setattr(export_module, "reference_output", biased)
    with pytest.raises(GrainwrightError, match="parity check failed"):
        export_checkpoint(source, tmp_path / "start.onnx", threads=1)
    assert not (tmp_path / "start.onnx").exists()


def test_parity_failure_writes_nothing(tmp_path, monkeypatch):
    source, _ = _checkpoint(tmp_path)
    real = export_module.reference_output

    def off_by_a_bit(*args, **kwargs):  # a torch side that disagrees with the graph by 1e-3 of the range
        return real(*args, **kwargs) + np.float32(4.095)

    monkeypatch.setattr(export_module, "reference_output", off_by_a_bit)
    output = tmp_path / "out" / "model.onnx"
    output.parent.mkdir()
    with pytest.raises(GrainwrightError, match="parity check failed.*nothing was written"):
        export_checkpoint(source, output)
    assert list(output.parent.iterdir()) == []


def test_bad_inputs_get_clear_errors(tmp_path, calibration_dir):
    source, payload = _checkpoint(tmp_path)
    with pytest.raises(InputError, match="no such checkpoint"):
        export_checkpoint(tmp_path / "missing.pt", tmp_path / "m.onnx")
    newer = save_checkpoint(tmp_path / "newer.pt", {**payload, "format_version": FORMAT_VERSION + 1})
    with pytest.raises(InputError, match="newer than this grainwright"):
        export_checkpoint(newer, tmp_path / "m.onnx")
    unknown = save_checkpoint(tmp_path / "unknown.pt", {**payload, "architecture": "unet-smal"})
    with pytest.raises(InputError, match="did you mean 'unet-small'"):
        export_checkpoint(unknown, tmp_path / "m.onnx")
    rgb = Normalization("uint16", 12, 0.0, 4095.0, 3)
    rgb_source, _ = _checkpoint(tmp_path, "residual", rgb)
    with pytest.raises(InputError, match="camera.tif: has 1 channel.*takes 3"):
        export_checkpoint(rgb_source, tmp_path / "m.onnx", calibration=calibration_dir)
    with pytest.raises(ConfigError, match="--int8 needs --calibration"):
        export_checkpoint(source, tmp_path / "m.onnx", int8=True)
    (tmp_path / "exists.onnx").write_bytes(b"keep me")
    with pytest.raises(InputError, match="already exists"):
        export_checkpoint(source, tmp_path / "exists.onnx")
    assert (tmp_path / "exists.onnx").read_bytes() == b"keep me"
    assert not (tmp_path / "m.onnx").exists()


def test_int8_keeps_input_normalisation_and_skip_in_float(tmp_path, calibration_dir):
    source, _ = _checkpoint(tmp_path, "residual")
    result = export_checkpoint(source, tmp_path / "model.onnx", calibration=calibration_dir, int8=True)
    assert result.int8_path == int8_path_for(tmp_path / "model.onnx") and result.int8_path.exists()
    proto = onnx.load(result.int8_path)
    onnx.checker.check_model(proto, full_check=True)
    nodes = list(proto.graph.node)
    assert any(node.op_type == "QuantizeLinear" for node in nodes)
    consumers = [node for node in nodes if "image" in node.input]
    assert consumers and all(node.op_type not in ("QuantizeLinear", "DequantizeLinear") for node in consumers)
    producer = next(node for node in nodes if "denoised" in node.output)
    assert producer.op_type not in ("QuantizeLinear", "DequantizeLinear")
    metadata = json.loads({e.key: e.value for e in proto.metadata_props}["grainwright"])
    assert metadata["precision"] == "int8" and metadata["int8"]["passed"]
    assert metadata["int8"]["psnr_vs_fp32_db"] >= 40.0 and metadata["int8"]["held_out_patches"] > 0
    # 12-bit input keeps its levels through the float skip path: outputs are not on a 256-level grid.
    image = tifffile.imread(calibration_dir / "moon.tif").astype(np.float32)[None, None]
    output = _session(result.int8_path).run(["denoised"], {"image": image})[0]
    assert len(np.unique(np.rint(output))) > 256


def test_int8_gate_failure_keeps_fp32_and_exits_non_zero(tmp_path, calibration_dir, capsys):
    source, _ = _checkpoint(tmp_path, "residual")
    output = tmp_path / "model.onnx"
    code = main(["export", str(source), "-o", str(output), "--calibration", str(calibration_dir), "--int8",
                 "--min-int8-psnr", "500", "--threads", "1"])
    printed = capsys.readouterr().out
    assert code == 1
    assert output.exists() and not int8_path_for(output).exists()
    assert "below the 500 dB threshold" in printed and " dB against the FP32 output" in printed


def test_cli_export_then_info(tmp_path, capsys):
    source, _ = _checkpoint(tmp_path, "residual-noisemap")
    output = tmp_path / "model.onnx"
    assert main(["export", str(source), "-o", str(output), "--threads", "1"]) == 0
    assert main(["info", str(output)]) == 0
    printed = capsys.readouterr().out
    assert "residual-noisemap" in printed and "noise_sigma" in printed and "receptive field   7 px" in printed
    assert main(["export", str(source), "-o", str(output)]) == 2  # exists, no --overwrite


def test_training_noise_level_falls_back_to_a_gaussian_noise_model(tmp_path):
    payload = new_checkpoint("residual", 1, TWELVE_BIT, hyper=TINY["residual"], noise={"kind": "gaussian", "sigma": 0.01})
    source = save_checkpoint(tmp_path / "gaussian.pt", payload)
    metadata = export_checkpoint(source, tmp_path / "model.onnx").metadata
    assert metadata["training_noise"]["sigma_native"] == pytest.approx(40.95)
    assert metadata["noise"] == {"kind": "gaussian", "sigma": 0.01}


@pytest.mark.parametrize("name", ["unet-small", "unet-halfres", "residual-noisemap"])
def test_graph_runs_at_any_size_and_matches_the_runtime_path(tmp_path, name):
    """Sizes off the alignment grid: the graph pads by reflection inside and crops back, giving what the runtime's
    own path gives (numpy 'reflect' padding, then the aligned run; tiled with a small tile, too)."""
    from grainwright.inference.runtime.runner import OnnxDenoiser

    source, _ = _checkpoint(tmp_path, name)
    result = export_checkpoint(source, tmp_path / "model.onnx")
    alignment = result.metadata["alignment"]  # declared for tiling: 4 (U-Net), 8 (half-resolution U-Net), 1
    denoiser = OnnxDenoiser(result.path, threads=1, tile=2 * max(alignment, 4), noise_sigma=40.0)
    session = _session(result.path)
    rng = np.random.default_rng(3)
    for height, width in ((37, 53), (alignment + 1, 2 * alignment + 3), (61, 29)):
        image = rng.uniform(0, 4095, (height, width, 1)).astype(np.float32)
        feeds = {"image": np.ascontiguousarray(image.transpose(2, 0, 1)[None])}
        if name == "residual-noisemap":
            feeds["noise_sigma"] = np.full((1, 1, height, width), 40.0, np.float32)
        direct = session.run(["denoised"], feeds)[0][0].transpose(1, 2, 0)
        assert direct.shape == image.shape
        np.testing.assert_allclose(direct, denoiser.run_whole(image), atol=1e-4 * 4095.0)
        np.testing.assert_allclose(direct, denoiser.run(image, as_float=True), atol=1e-4 * 4095.0)


def test_metadata_names_the_training_folder_but_not_its_path_unless_asked(tmp_path, capsys):
    private = "/home/someone/customer-x/line-3/frames"
    payload = new_checkpoint("residual", 1, TWELVE_BIT, hyper=TINY["residual"], data_fingerprint="sha256:00ff",
                             training_summary={"data_folder": private, "steps": 10})
    source = save_checkpoint(tmp_path / "trained.pt", payload)
    metadata = export_checkpoint(source, tmp_path / "model.onnx").metadata
    assert metadata["training_summary"] == {"data_folder": "frames", "steps": 10}
    assert metadata["data_fingerprint"] == "sha256:00ff"
    stored = {entry.key: entry.value for entry in onnx.load(tmp_path / "model.onnx").metadata_props}
    assert "customer-x" not in stored["grainwright"]
    assert main(["export", str(source), "-o", str(tmp_path / "full.onnx"), "--record-data-path",
                 "--threads", "1"]) == 0
    stored = {entry.key: entry.value for entry in onnx.load(tmp_path / "full.onnx").metadata_props}
    assert json.loads(stored["grainwright"])["training_summary"]["data_folder"] == private


def test_info_states_the_noise_kind_the_transform_and_how_they_were_decided(tmp_path, capsys):
    summary = {"noise_kind": "speckle-gamma", "noise_decided_by": "analysis of the training images",
               "transform": "log", "transform_decided_by": "analysis of the training images",
               "noise_found": "speckle-gamma (speckle-gamma(looks=3.9)) on 4 of 4 image(s), fit confident on 0 of them"}
    payload = new_checkpoint("residual", 1, TWELVE_BIT.with_log(looks=3.9, noisy_targets=True),
                             hyper=TINY["residual"], training_summary=summary)
    source = save_checkpoint(tmp_path / "speckle.pt", payload)
    assert main(["export", str(source), "-o", str(tmp_path / "model.onnx"), "--threads", "1"]) == 0
    assert main(["info", str(tmp_path / "model.onnx")]) == 0
    printed = capsys.readouterr().out
    assert ("decided           noise speckle-gamma (from the analysis of the training images); transform log "
            "(decided by the analysis of the training images)") in printed
    assert "bias=-0.1" in printed  # the log-domain correction travels in the transform
