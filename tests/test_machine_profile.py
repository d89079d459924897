"""The machine profile: hand-written ONNX reference graphs, measuring, and reading profile files.

References: the ONNX IR specification as implemented by the ``onnx`` package (parser and checker); the Protocol
Buffers encoding guide (varint example 300 -> AC 02); SciPy's ``correlate2d`` as the reference 2-D
cross-correlation (what ONNX ``Conv`` computes).
"""
from __future__ import annotations

import json

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import numpy_helper
from scipy.signal import correlate2d

from grainwright.inference.common.errors import InputError
from grainwright.inference.runtime import machine_profile as mp


def _session(proto: bytes) -> ort.InferenceSession:
    return ort.InferenceSession(proto, providers=["CPUExecutionProvider"])


def test_varint_matches_the_protobuf_encoding_guide():
    # Protocol Buffers documentation, "Encoding": 1 -> 01, 150 -> 96 01, 300 -> AC 02.
    assert mp._varint(1) == b"\x01"
    assert mp._varint(150) == b"\x96\x01"
    assert mp._varint(300) == b"\xac\x02"


@pytest.mark.parametrize("precision", mp.PRECISIONS)
def test_reference_stack_is_a_valid_onnx_model(precision):
    model = onnx.load_from_string(mp.reference_stack(4, 6, precision))
    onnx.checker.check_model(model, full_check=True)  # the onnx package as the reference parser and checker
    assert [i.name for i in model.graph.input] == ["image"]
    assert [o.name for o in model.graph.output] == ["denoised"]
    assert model.opset_import[0].version == mp.OPSET
    ops = [node.op_type for node in model.graph.node]
    assert ops.count("Conv") == (4 if precision == "fp32" else 2)
    assert ops.count("QLinearConv") == (0 if precision == "fp32" else 2)


def test_fp32_stack_equals_scipy_cross_correlation():
    proto = mp.reference_stack(3, 2, "fp32", seed=3)
    model = onnx.load_from_string(proto)
    weights = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
    image = np.random.default_rng(1).random((9, 11)).astype(np.float64)

    def conv(channels: list[np.ndarray], name: str) -> list[np.ndarray]:
        kernel, bias = weights[name], weights[name + ".bias"]
        return [sum(correlate2d(c, kernel[o, i], mode="same") for i, c in enumerate(channels)) + bias[o]
                for o in range(kernel.shape[0])]

    relu = lambda channels: [np.maximum(c, 0) for c in channels]  # noqa: E731
    expected = conv(relu(conv(relu(conv([image], "w0")), "w1")), "w2")[0]
    session = _session(proto)
    output = session.run(["denoised"], {"image": image[None, None].astype(np.float32)})[0][0, 0]
    np.testing.assert_allclose(output, expected, rtol=1e-4, atol=1e-5)


def test_int8_stack_runs_on_any_size():
    session = _session(mp.reference_stack(4, 8, "int8"))
    output = session.run(["denoised"], {"image": np.random.rand(2, 1, 13, 7).astype(np.float32)})[0]
    assert output.shape == (2, 1, 13, 7) and np.all(np.isfinite(output))


def test_reference_macs_match_the_residual_architecture():
    torch = pytest.importorskip("torch")  # noqa: F841
    from grainwright.models.registry import build_model

    for depth, width in ((3, 4), (8, 32), (10, 48)):
        model = build_model("residual", 1, depth=depth, width=width)
        assert mp.reference_macs_per_pixel(depth, width) == model.macs_per_pixel()
        # Count by hand from the layer list (DnCNN: first, middle and last 3x3 convolutions).
        layers = [m for m in model.modules() if m.__class__.__name__ == "Conv2d"]
        assert sum(9 * layer.in_channels * layer.out_channels for layer in layers) == model.macs_per_pixel()


def test_measure_profile_small_round_trip(tmp_path):
    profile = mp.measure_profile(threads=1, widths=(4, 8), edge=32, repeats=1, overhead_edges=(32, 64),
                                 log=lambda _: None)
    for precision in mp.PRECISIONS:
        assert set(profile["seconds_per_gmac"][precision]) == {"4", "8"}
        assert all(value > 0 for value in profile["seconds_per_gmac"][precision].values())
    assert profile["runtime_overhead"]["seconds_per_megapixel"] >= 0
    assert profile["runtime_overhead"]["seconds_per_frame"] >= 0
    path = mp.save_profile(profile, tmp_path / "machine.json")
    assert mp.load_profile(path) == json.loads(path.read_text())


def _profile(**changes):
    profile = {"format": mp.PROFILE_FORMAT, "version": 1, "threads": 2,
               "seconds_per_gmac": {"fp32": {"16": 0.2, "64": 0.05}, "int8": {"16": 0.1}},
               "runtime_overhead": {"seconds_per_megapixel": 0.1}}
    profile.update(changes)
    return profile


@pytest.mark.parametrize("content, problem", [
    ("{not json", "not valid JSON"),
    (json.dumps({"format": "something else"}), "not a grainwright machine profile"),
    (json.dumps(_profile(version=99)), "version 99"),
    (json.dumps(_profile(seconds_per_gmac={"fp32": {}})), "no FP32"),
    (json.dumps(_profile(seconds_per_gmac={"fp32": {"16": -1.0}})), "positive number"),
    (json.dumps(_profile(seconds_per_gmac={"fp32": {"wide": 0.1}})), "positive number"),
    (json.dumps(_profile(runtime_overhead={"seconds_per_megapixel": "fast"})), "runtime_overhead"),
    (json.dumps(_profile(threads=0)), "threads"),
])
def test_bad_profile_file_is_refused_naming_it(tmp_path, content, problem):
    path = tmp_path / "plant.json"
    path.write_text(content)
    with pytest.raises(InputError) as caught:
        mp.load_profile(path)
    assert "plant.json" in str(caught.value) and problem in str(caught.value)


def test_missing_profile_is_refused_naming_it(tmp_path):
    with pytest.raises(InputError, match="absent.json.*not found"):
        mp.load_profile(tmp_path / "absent.json")


def test_seconds_per_gmac_interpolates_in_log_width():
    profile = _profile()
    assert mp.seconds_per_gmac_for(profile, 16) == pytest.approx(0.2)
    assert mp.seconds_per_gmac_for(profile, 64) == pytest.approx(0.05)
    assert mp.seconds_per_gmac_for(profile, 32) == pytest.approx(0.125)  # half-way in log(width)
    assert mp.seconds_per_gmac_for(profile, 8) == pytest.approx(0.2)  # nearest outside the measured widths
    assert mp.seconds_per_gmac_for(profile, 48, "int8") == pytest.approx(0.1)
