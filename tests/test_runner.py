"""The ONNX Runtime denoiser on arrays: strength, noise maps, self-ensemble, dtypes, refusals.

Small ONNX graphs are built here with ``onnx.helper`` (conv stacks with the grainwright interface: native values
in, native values out), so these tests need neither torch nor a trained model.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.runtime.runner import ModelSpec, OnnxDenoiser

NATIVE_HIGH = 1000.0  # the graphs map 0..1000 native to 0..1 working
TRAINING_NOISE = {"kind": "poisson-gaussian", "gain": 0.01, "read": 0.02}  # working units


def build_conv_model(
    path: Path,
    *,
    channels: int = 1,
    layers: int = 3,
    width: int = 4,
    seed: int = 0,
    noise_map: bool = False,
    pooled: bool = False,
    metadata: bool = True,
    training_sigma: float | None = None,
) -> Path:
    """Write a small residual conv stack as ONNX: ``denoised = image - high * f(image / high)``.

    With ``pooled`` the middle goes through a 2x2 average pool and nearest upsampling (alignment 2, like a
    one-level U-Net). Returns ``path``.
    """
    rng = np.random.default_rng(seed)
    nodes, inits = [], []

    def const(name: str, value: np.ndarray) -> str:
        inits.append(numpy_helper.from_array(np.asarray(value, np.float32), name))
        return name

    def conv(x: str, c_in: int, c_out: int, tag: str, relu: bool = True) -> str:
        weight = const(f"w{tag}", rng.normal(0, 0.5 / np.sqrt(9 * c_in), (c_out, c_in, 3, 3)))
        bias = const(f"b{tag}", rng.normal(0, 0.05, c_out))
        nodes.append(helper.make_node("Conv", [x, weight, bias], [f"c{tag}"], pads=[1, 1, 1, 1]))
        if not relu:
            return f"c{tag}"
        nodes.append(helper.make_node("Relu", [f"c{tag}"], [f"r{tag}"]))
        return f"r{tag}"

    scale = const("scale", np.float32(1.0 / NATIVE_HIGH))
    nodes.append(helper.make_node("Mul", ["image", scale], ["x"]))
    inputs = [helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", channels, "H", "W"])]
    x, c_in = "x", channels
    if noise_map:
        inputs.append(helper.make_tensor_value_info("noise_sigma", TensorProto.FLOAT, ["N", 1, "H", "W"]))
        nodes.append(helper.make_node("Mul", ["noise_sigma", scale], ["s"]))
        nodes.append(helper.make_node("Concat", ["x", "s"], ["xs"], axis=1))
        x, c_in = "xs", channels + 1
    h = conv(x, c_in, width, "0")
    radius = 1
    if pooled:
        nodes.append(helper.make_node("AveragePool", [h], ["p"], kernel_shape=[2, 2], strides=[2, 2]))
        low = conv("p", width, width, "p")
        sizes = const("upscale", np.array([1, 1, 2, 2]))
        nodes.append(helper.make_node("Resize", [low, "", sizes], ["u"], mode="nearest"))
        nodes.append(helper.make_node("Add", ["u", h], ["h1"]))
        h = "h1"
        radius += 1 + 2 + 1  # pool window, one conv at half resolution, upsampling
    for index in range(1, layers - 1):
        h = conv(h, width, width, str(index))
        radius += 1
    prediction = conv(h, width, channels, "out", relu=False)
    radius += 1
    high = const("high", np.float32(NATIVE_HIGH))
    nodes.append(helper.make_node("Mul", [prediction, high], ["noise"]))
    nodes.append(helper.make_node("Sub", ["image", "noise"], ["denoised"]))
    graph = helper.make_graph(
        nodes, "test-conv", inputs,
        [helper.make_tensor_value_info("denoised", TensorProto.FLOAT, ["N", channels, "H", "W"])], inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    if metadata:
        document = {
            "format": "grainwright-model",
            "format_version": 1,
            "architecture": {"name": "test-conv"},
            "receptive_field": 2 * radius + 1,
            "alignment": 2 if pooled else 1,
            "macs_per_pixel": 9 * width * width * layers,
            "channels": channels,
            "takes_noise_map": noise_map,
            "normalization": {"dtype": "uint16", "bit_depth": 10, "low": 0.0, "high": NATIVE_HIGH},
        }
        if training_sigma is not None:
            document["training_noise"] = {"sigma_native": training_sigma}
        if noise_map:
            document["noise"] = dict(TRAINING_NOISE)
        onnx.helper.set_model_props(model, {"grainwright": json.dumps(document)})
    onnx.checker.check_model(model)
    onnx.save(model, str(path))
    return path


@pytest.fixture
def conv_model(tmp_path: Path) -> Path:
    return build_conv_model(tmp_path / "conv.onnx")


def test_tiled_equals_whole_on_a_sample_image(conv_model):
    # Open data: scikit-image's bundled camera image (512 x 512), cropped, scaled to the graph's 0..1000 range.
    from skimage import data

    image = (data.camera()[:150, :190, None].astype(np.float32) * (NATIVE_HIGH / 255)).astype(np.uint16)
    denoiser = OnnxDenoiser(conv_model, threads=1, tile=32, batch=3)
    tiled = denoiser.run(image, as_float=True)
    whole = denoiser.run_whole(image)
    assert np.max(np.abs(tiled - whole)) / NATIVE_HIGH < 1e-5
    assert not np.allclose(tiled, image)  # the graph does change the image


def test_output_keeps_dtype_and_clips_to_the_model_range(conv_model):
    image = np.full((20, 30, 1), 990, np.uint16)
    out = OnnxDenoiser(conv_model, threads=1).run(image)
    assert out.dtype == np.uint16 and out.shape == image.shape
    assert out.max() <= NATIVE_HIGH  # the model's native range, not the dtype's
    flat = OnnxDenoiser(conv_model, threads=1).run(image[:, :, 0])
    assert flat.shape == (20, 30)


def test_strength_blends_between_input_and_model_output(conv_model):
    image = np.random.default_rng(1).uniform(0, NATIVE_HIGH, (24, 24, 1)).astype(np.float32)
    full = OnnxDenoiser(conv_model, threads=1).run(image, as_float=True)
    half = OnnxDenoiser(conv_model, threads=1, strength=0.5).run(image, as_float=True)
    none = OnnxDenoiser(conv_model, threads=1, strength=0.0).run(image, as_float=True)
    np.testing.assert_allclose(half, image + 0.5 * (full - image), atol=1e-3)
    np.testing.assert_allclose(none, image, atol=1e-4)


def test_noise_map_strength_scales_the_map(tmp_path):
    path = build_conv_model(tmp_path / "map.onnx", noise_map=True, training_sigma=20.0)
    image = np.random.default_rng(2).uniform(0, NATIVE_HIGH, (16, 20, 1)).astype(np.float32)
    doubled = OnnxDenoiser(path, threads=1, noise_sigma=10.0, strength=2.0).run(image, as_float=True)
    direct = OnnxDenoiser(path, threads=1, noise_sigma=20.0).run(image, as_float=True)
    trained = OnnxDenoiser(path, threads=1, noise_sigma="training").run(image, as_float=True)
    other = OnnxDenoiser(path, threads=1, noise_sigma=5.0).run(image, as_float=True)
    np.testing.assert_allclose(doubled, direct, atol=1e-4)
    np.testing.assert_allclose(trained, direct, atol=1e-4)
    assert np.max(np.abs(other - direct)) > 1e-3


def test_noise_map_from_the_training_noise_model(tmp_path):
    # Reference: the Poisson-Gaussian variance model gain * x + read^2 (Foi et al. 2008), in working units.
    path = build_conv_model(tmp_path / "map.onnx", noise_map=True)
    denoiser = OnnxDenoiser(path, threads=1, noise_sigma="model", strength=1.5)
    windows = np.random.default_rng(4).uniform(-50, NATIVE_HIGH, (2, 1, 6, 7)).astype(np.float32)
    x = np.clip(windows / NATIVE_HIGH, 0, 1)
    expected = 1.5 * NATIVE_HIGH * np.sqrt(TRAINING_NOISE["gain"] * x + TRAINING_NOISE["read"] ** 2)
    np.testing.assert_allclose(denoiser._noise_map(windows, None), expected, rtol=1e-5)
    image = windows[0].transpose(1, 2, 0)
    np.testing.assert_allclose(denoiser.run(image, as_float=True), denoiser.run_whole(image), atol=1e-3)
    with pytest.raises(ConfigError, match="no noise model"):
        OnnxDenoiser(build_conv_model(tmp_path / "plain.onnx", noise_map=True, metadata=True, seed=1),
                 noise_sigma="model", spec=ModelSpec(receptive_field=9))


@pytest.mark.parametrize("members", [2, 4, 8])
def test_self_ensemble_is_the_mean_over_flips_and_rotations(conv_model, members):
    # numpy's own flips and rotations are the reference for the dihedral transforms.
    image = np.random.default_rng(3).uniform(0, NATIVE_HIGH, (18, 26, 1)).astype(np.float32)
    plain = OnnxDenoiser(conv_model, threads=1)
    transforms = [
        (lambda a: a, lambda a: a),
        (lambda a: a[:, ::-1], lambda a: a[:, ::-1]),
        (lambda a: a[::-1], lambda a: a[::-1]),
        (lambda a: a[::-1, ::-1], lambda a: a[::-1, ::-1]),
        (lambda a: a.transpose(1, 0, 2), lambda a: a.transpose(1, 0, 2)),
        (lambda a: np.rot90(a, 1), lambda a: np.rot90(a, -1)),
        (lambda a: np.rot90(a, -1), lambda a: np.rot90(a, 1)),
        (lambda a: np.rot90(a, 2).transpose(1, 0, 2), lambda a: np.rot90(a.transpose(1, 0, 2), -2)),
    ]
    outputs = [back(plain.run_whole(np.ascontiguousarray(go(image)))) for go, back in transforms]
    ensemble = OnnxDenoiser(conv_model, threads=1, ensemble=members, tile=16)
    result = ensemble.run(image, as_float=True)
    if members == 8:
        np.testing.assert_allclose(result, np.mean(outputs, axis=0), atol=1e-3)
    else:  # the smaller ensembles average a subset: check against the whole-image ensemble
        np.testing.assert_allclose(result, ensemble.run_whole(image), atol=1e-2)
    assert np.max(np.abs(result - outputs[0])) > 1e-3


def test_model_without_metadata_is_refused_unless_figures_are_given(tmp_path):
    path = build_conv_model(tmp_path / "bare.onnx", metadata=False)
    with pytest.raises(InputError, match="no grainwright metadata"):
        OnnxDenoiser(path)
    denoiser = OnnxDenoiser(path, threads=1, spec=ModelSpec(receptive_field=7))
    assert denoiser.spec.margin == 3
    assert denoiser.run(np.zeros((5, 5, 1), np.uint16)).shape == (5, 5, 1)


def test_bad_inputs_give_clear_errors(conv_model, tmp_path):
    with pytest.raises(InputError, match="not found"):
        OnnxDenoiser(tmp_path / "missing.onnx")
    junk = tmp_path / "junk.onnx"
    junk.write_bytes(b"not a model")
    with pytest.raises(InputError, match="not a loadable ONNX model"):
        OnnxDenoiser(junk)
    with pytest.raises(ConfigError, match="ensemble"):
        OnnxDenoiser(conv_model, ensemble=3)
    denoiser = OnnxDenoiser(conv_model, threads=1)
    with pytest.raises(InputError, match="3 channel"):
        denoiser.run(np.zeros((8, 8, 3), np.uint16))
    with pytest.raises(InputError, match="NaN"):
        denoiser.run(np.full((8, 8, 1), np.nan, np.float32))
