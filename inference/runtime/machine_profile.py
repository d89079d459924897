"""A machine profile: how fast this CPU runs 3x3 convolution stacks through ONNX Runtime, for sizing a model.

The profile holds seconds per GMAC (10^9 multiply-accumulates) for FP32 and INT8 at ``threads`` threads,
measured through the runtime's tiled, batched path (in memory) on reference stacks of 3x3 convolutions (the
``residual`` architecture's shape: conv+ReLU layers of ``width`` channels on one image channel) at several
widths, because small widths use the vector units less well. It also holds the runtime's own cost beyond the
network (file reading and writing, the domain check, conversion), per frame and per megapixel, measured by
running the FP32 reference through the file-to-file ``denoise`` path on two frame sizes.
``grainwright.trainer.sizing`` turns it into a predicted time per frame.

The plant machine has ONNX Runtime but no torch and maybe no ``onnx`` package, so the reference graphs are
written here directly in the ONNX protobuf wire format (ONNX IR spec, ``onnx/onnx.proto``; protobuf encoding per
the Protocol Buffers "Encoding" guide: varint keys ``field << 3 | wire type``, length-delimited messages).
``tests/test_machine_profile.py`` parses them with the ``onnx`` package and runs its checker.

The INT8 reference mirrors ``grainwright export --int8``: float first and last convolutions, the body as
``QLinearConv`` with unsigned 8-bit activations and signed 8-bit weights (what ONNX Runtime fuses a QDQ graph
into).
"""
from __future__ import annotations

import datetime
import json
import os
import platform
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import onnxruntime as ort

from grainwright.inference.common.atomic import write_json_atomic
from grainwright.inference.common.errors import InputError

PROFILE_FORMAT = "grainwright-machine-profile"
PROFILE_VERSION = 1
REFERENCE_DEPTH = 8
REFERENCE_WIDTHS = (16, 24, 32, 48, 64)  # the widths of the size ladder
REFERENCE_EDGE = 512
PRECISIONS = ("fp32", "int8")

# ONNX TensorProto.DataType values (onnx.proto).
FLOAT, UINT8, INT8, INT32 = 1, 2, 3, 6
# AttributeProto.AttributeType values.
ATTRIBUTE_INTS = 7
OPSET = 13
IR_VERSION = 7


# -- minimal protobuf encoding of the ONNX messages we need --------------------------------------------------


def _varint(value: int) -> bytes:
    out = bytearray()
    value &= (1 << 64) - 1  # negative int64 values are encoded as 64-bit two's complement
    while True:
        byte = value & 0x7F
        value >>= 7
        if value:
            out.append(byte | 0x80)
        else:
            out.append(byte)
            return bytes(out)


def _int(field: int, value: int) -> bytes:
    return _varint(field << 3) + _varint(value)


def _bytes(field: int, payload: bytes | str) -> bytes:
    data = payload.encode() if isinstance(payload, str) else payload
    return _varint(field << 3 | 2) + _varint(len(data)) + data


def tensor_proto(name: str, array: np.ndarray) -> bytes:
    """TensorProto: dims (1), data_type (2), name (8), raw_data (9, little-endian)."""
    types = {np.dtype(np.float32): FLOAT, np.dtype(np.uint8): UINT8, np.dtype(np.int8): INT8,
             np.dtype(np.int32): INT32}
    array = np.asarray(array)
    out = b"".join(_int(1, dim) for dim in array.shape) + _int(2, types[array.dtype]) + _bytes(8, name)
    return out + _bytes(9, array.astype(array.dtype.newbyteorder("<"), copy=False).tobytes())


def node_proto(op_type: str, inputs: list[str], outputs: list[str], name: str, **ints: list[int]) -> bytes:
    """NodeProto: input (1), output (2), name (3), op_type (4), attribute (5: name 1, ints 8, type 20)."""
    out = b"".join(_bytes(1, item) for item in inputs) + b"".join(_bytes(2, item) for item in outputs)
    out += _bytes(3, name) + _bytes(4, op_type)
    for key, values in ints.items():
        attribute = _bytes(1, key) + b"".join(_int(8, v) for v in values) + _int(20, ATTRIBUTE_INTS)
        out += _bytes(5, attribute)
    return out


def value_info(name: str, elem_type: int, shape: tuple[int | str, ...]) -> bytes:
    """ValueInfoProto: name (1), type (2: TypeProto.tensor_type 1: elem_type 1, shape 2: dim 1)."""
    dims = b"".join(_bytes(1, _int(1, d) if isinstance(d, int) else _bytes(2, d)) for d in shape)
    tensor_type = _int(1, elem_type) + _bytes(2, dims)
    return _bytes(1, name) + _bytes(2, _bytes(1, tensor_type))


def model_proto(nodes: list[bytes], initializers: list[bytes], inputs: list[bytes], outputs: list[bytes],
                name: str, metadata: dict[str, str] | None = None) -> bytes:
    """ModelProto: ir_version (1), producer_name (2), graph (7: node 1, name 2, initializer 5, input 11,
    output 12), opset_import (8: domain 1, version 2), metadata_props (14: key 1, value 2)."""
    graph = b"".join(_bytes(1, node) for node in nodes) + _bytes(2, name)
    graph += b"".join(_bytes(5, item) for item in initializers)
    graph += b"".join(_bytes(11, item) for item in inputs) + b"".join(_bytes(12, item) for item in outputs)
    out = _int(1, IR_VERSION) + _bytes(2, "grainwright") + _bytes(7, graph) + _bytes(8, _bytes(1, "") + _int(2, OPSET))
    for key, value in (metadata or {}).items():
        out += _bytes(14, _bytes(1, key) + _bytes(2, value))
    return out


# -- the reference stacks -------------------------------------------------------------------------------------


def reference_macs_per_pixel(depth: int, width: int, channels: int = 1) -> int:
    """Multiply-accumulates per pixel of a stack of ``depth`` 3x3 convolutions ``channels -> width -> ... ->
    channels`` (the count of ``grainwright.models.residual.conv_stack_macs``)."""
    return 9 * (channels * width + (depth - 2) * width * width + width * channels)


def reference_stack(depth: int, width: int, precision: str = "fp32", seed: int = 0) -> bytes:
    """A serialised ONNX model: ``depth`` 3x3 convolutions (zero padding 1) with ReLU between them, one image
    channel in and out, input ``image`` and output ``denoised`` of shape ``(N, 1, H, W)`` float32. Weights are
    random (He-scaled) since only the speed matters. ``precision="int8"`` quantises the body (see the module
    docstring)."""
    if precision not in PRECISIONS:
        raise ValueError(f"precision must be one of {PRECISIONS}, got {precision!r}")
    if depth < 3 or width < 1:
        raise ValueError(f"need depth >= 3 and width >= 1, got {depth} x {width}")
    rng = np.random.default_rng(seed)
    nodes, initializers = [], []
    conv = {"kernel_shape": [3, 3], "pads": [1, 1, 1, 1]}

    def weights(name: str, out_channels: int, in_channels: int) -> None:
        scale = np.sqrt(2.0 / (9 * in_channels))
        initializers.append(tensor_proto(name, (rng.standard_normal((out_channels, in_channels, 3, 3)) * scale)
                                         .astype(np.float32)))
        initializers.append(tensor_proto(name + ".bias", np.zeros(out_channels, np.float32)))

    def float_conv(index: int, source: str, in_channels: int, out_channels: int, relu: bool) -> str:
        weights(f"w{index}", out_channels, in_channels)
        target = f"c{index}"
        nodes.append(node_proto("Conv", [source, f"w{index}", f"w{index}.bias"], [target], f"conv{index}", **conv))
        if relu:
            nodes.append(node_proto("Relu", [target], [f"r{index}"], f"relu{index}"))
            target = f"r{index}"
        return target

    last = float_conv(0, "image", 1, width, relu=True)
    if precision == "fp32":
        for index in range(1, depth - 1):
            last = float_conv(index, last, width, width, relu=True)
    else:
        initializers += [tensor_proto("a.scale", np.array(0.02, np.float32)),
                         tensor_proto("a.zero", np.array(0, np.uint8))]
        nodes.append(node_proto("QuantizeLinear", [last, "a.scale", "a.zero"], ["q0"], "quantize"))
        last = "q0"
        for index in range(1, depth - 1):
            w = rng.integers(-127, 128, (width, width, 3, 3)).astype(np.int8)
            initializers += [tensor_proto(f"w{index}", w), tensor_proto(f"w{index}.scale", np.array(0.01, np.float32)),
                             tensor_proto(f"w{index}.zero", np.array(0, np.int8)),
                             tensor_proto(f"w{index}.bias", np.zeros(width, np.int32))]
            nodes.append(node_proto("QLinearConv", [last, "a.scale", "a.zero", f"w{index}", f"w{index}.scale",
                                                    f"w{index}.zero", "a.scale", "a.zero", f"w{index}.bias"],
                                    [f"q{index}"], f"qconv{index}", **conv))
            last = f"q{index}"
        nodes.append(node_proto("DequantizeLinear", [last, "a.scale", "a.zero"], ["body"], "dequantize"))
        last = "body"
    weights(f"w{depth - 1}", 1, width)
    nodes.append(node_proto("Conv", [last, f"w{depth - 1}", f"w{depth - 1}.bias"], ["denoised"],
                            f"conv{depth - 1}", **conv))
    shape = ("N", 1, "H", "W")
    return model_proto(nodes, initializers, [value_info("image", FLOAT, shape)],
                       [value_info("denoised", FLOAT, shape)], f"reference-{depth}x{width}-{precision}")


# -- measuring --------------------------------------------------------------------------------------------------


def _median_seconds(action: Any, repeats: int) -> float:
    action()  # warm-up: kernels, arenas
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        action()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def seconds_per_gmac(depth: int, width: int, precision: str, threads: int, edge: int = REFERENCE_EDGE,
                     repeats: int = 3) -> float:
    """Measured seconds per 10^9 MACs of the reference stack run by the runtime (default tiles, batched session
    calls, in memory) on one ``edge`` x ``edge`` image, counting the MACs of every pixel the tiles compute."""
    from grainwright.inference.runtime.runner import ModelSpec, OnnxDenoiser

    with tempfile.TemporaryDirectory(prefix="grainwright-profile-") as temp:
        path = Path(temp) / "reference.onnx"
        path.write_bytes(reference_stack(depth, width, precision))
        denoiser = OnnxDenoiser(path, threads=threads, spec=ModelSpec(receptive_field=2 * depth + 1))
        image = np.random.default_rng(0).random((edge, edge, 1), dtype=np.float32)
        seconds = _median_seconds(lambda: denoiser.run(image, as_float=True), repeats)
        computed = denoiser.plan(edge, edge).computed_pixels
    return seconds / (reference_macs_per_pixel(depth, width) * computed / 1e9)


def runtime_overhead(threads: int, fp32: dict[str, float], edges: tuple[int, int] = (512, 1024), width: int = 32,
                     repeats: int = 3) -> dict[str, Any]:
    """Time the file-to-file ``denoise`` path spends beyond the network's convolutions: a cost per frame plus a
    cost per megapixel.

    Runs the FP32 reference (``width`` channels) on generated 16-bit TIFF frames of two ``edges`` through
    :func:`grainwright.inference.runtime.batch.denoise_files` at the default tile size (the sizes alternate), and
    subtracts the network time predicted from ``fp32`` (seconds per GMAC by width) for the pixels the tiles
    compute. The two remainders give the per-frame and per-megapixel costs (a straight line; both clamped at 0).
    """
    from grainwright.inference.images.imageio import write_image
    from grainwright.inference.runtime.batch import denoise_files
    from grainwright.inference.runtime.runner import ModelSpec, OnnxDenoiser

    depth = REFERENCE_DEPTH
    rng = np.random.default_rng(0)
    with tempfile.TemporaryDirectory(prefix="grainwright-profile-") as temp:
        folder = Path(temp)
        model_path = folder / "reference.onnx"
        model_path.write_bytes(reference_stack(depth, width, "fp32"))
        denoiser = OnnxDenoiser(model_path, threads=threads, spec=ModelSpec(receptive_field=2 * depth + 1))
        sources = []
        for edge in edges:
            frame = np.clip(rng.normal(20000, 800, (edge, edge, 1)), 0, 65535).astype(np.uint16)
            sources.append(write_image(folder / "in" / f"frame-{edge}.tif", frame))

        def file_path(source: Path) -> None:
            [result] = denoise_files(denoiser, [source], folder / "out", overwrite=True)
            if result.status != "done":
                raise InputError(source, f"profile run failed: {result.message}")

        for source in sources:  # warm-up
            file_path(source)
        times: list[list[float]] = [[] for _ in edges]
        for _ in range(repeats):
            for index, source in enumerate(sources):
                start = time.perf_counter()
                file_path(source)
                times[index].append(time.perf_counter() - start)
        computed = [denoiser.plan(edge, edge).computed_pixels for edge in edges]
    measurements = []
    for edge, values, pixels in zip(edges, times, computed):
        seconds = statistics.median(values)
        network = reference_macs_per_pixel(depth, width) * pixels / 1e9 * fp32[str(width)]
        measurements.append({"edge": edge, "measured_seconds": seconds, "predicted_network_seconds": network,
                             "remainder_seconds": seconds - network, "megapixels": edge * edge / 1e6})
    small, large = measurements
    per_megapixel = max(0.0, (large["remainder_seconds"] - small["remainder_seconds"])
                        / (large["megapixels"] - small["megapixels"]))
    per_frame = max(0.0, small["remainder_seconds"] - per_megapixel * small["megapixels"])
    return {"seconds_per_megapixel": per_megapixel, "seconds_per_frame": per_frame, "width": width,
            "measurements": measurements}


def measure_profile(threads: int = 2, widths: tuple[int, ...] = REFERENCE_WIDTHS, edge: int = REFERENCE_EDGE,
                    repeats: int = 3, overhead_edges: tuple[int, int] = (512, 1024),
                    precisions: tuple[str, ...] = PRECISIONS, log: Any = print) -> dict[str, Any]:
    """Measure this machine's profile (see the module docstring): reference stacks on ``edge`` x ``edge``
    images, the runtime's own cost on frames of ``overhead_edges``. Precisions alternate per width so that load
    changes on a shared machine hit both alike; ``precisions`` must include ``"fp32"``."""
    profile: dict[str, Any] = {
        "format": PROFILE_FORMAT, "version": PROFILE_VERSION, "machine": platform.platform(),
        "processor": platform.processor() or platform.machine(), "cpus": os.cpu_count(), "threads": int(threads),
        "measured_at": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
        "onnxruntime": ort.__version__,
        "reference": {"depth": REFERENCE_DEPTH, "widths": list(widths), "edge": edge, "repeats": repeats},
        "seconds_per_gmac": {precision: {} for precision in precisions},
    }
    for width in widths:
        for precision in precisions:
            value = seconds_per_gmac(REFERENCE_DEPTH, width, precision, threads, edge, repeats)
            profile["seconds_per_gmac"][precision][str(width)] = value
            log(f"  {precision} width {width:3d}: {value:.4f} s/GMAC ({1 / value:.1f} GMAC/s)")
    middle = sorted(widths)[len(widths) // 2 - 1] if len(widths) > 1 else widths[0]
    profile["runtime_overhead"] = runtime_overhead(threads, profile["seconds_per_gmac"]["fp32"],
                                                   edges=overhead_edges, width=middle, repeats=repeats)
    log(f"  runtime beyond the network: {profile['runtime_overhead']['seconds_per_frame']:.3f} s per frame + "
        f"{profile['runtime_overhead']['seconds_per_megapixel']:.3f} s/MP")
    return profile


# -- reading and writing --------------------------------------------------------------------------------------


def save_profile(profile: dict[str, Any], path: str | Path) -> Path:
    """Write the profile as JSON atomically (temporary name in the same folder, then rename)."""
    return write_json_atomic(path, profile, indent=1)


def load_profile(path: str | Path) -> dict[str, Any]:
    """Read and check a machine profile.

    Raises
    ------
    InputError
        Missing file, not JSON, not a grainwright machine profile, a newer format version, or seconds per GMAC
        missing or not positive; the message names the file and the problem.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(path, "machine profile not found (write one with 'grainwright bench runtime MODEL "
                               "--profile-out PROFILE.json' on the target machine)")
    try:
        profile = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as error:
        raise InputError(path, f"machine profile is not valid JSON ({error})") from None
    if not isinstance(profile, dict) or profile.get("format") != PROFILE_FORMAT:
        raise InputError(path, f"not a grainwright machine profile (expected \"format\": \"{PROFILE_FORMAT}\")")
    if not isinstance(profile.get("version"), int) or profile["version"] > PROFILE_VERSION:
        raise InputError(path, f"machine profile version {profile.get('version')!r} is not one this grainwright "
                               f"reads (up to {PROFILE_VERSION})")
    table = profile.get("seconds_per_gmac")
    if not isinstance(table, dict) or not isinstance(table.get("fp32"), dict) or not table["fp32"]:
        raise InputError(path, "machine profile has no FP32 seconds per GMAC")
    for precision, by_width in table.items():
        if not isinstance(by_width, dict):
            raise InputError(path, f"machine profile: seconds_per_gmac.{precision} must map widths to seconds")
        for width, value in by_width.items():
            if not str(width).isdigit() or isinstance(value, bool) or not isinstance(value, (int, float)) \
                    or not np.isfinite(value) or value <= 0:
                raise InputError(path, f"machine profile: seconds_per_gmac.{precision}.{width} must be a "
                                       f"positive number, got {value!r}")
    for key in ("seconds_per_megapixel", "seconds_per_frame"):
        overhead = profile.get("runtime_overhead", {}).get(key, 0.0)
        if isinstance(overhead, bool) or not isinstance(overhead, (int, float)) or not overhead >= 0:
            raise InputError(path, f"machine profile: runtime_overhead.{key} must be a number >= 0, got "
                                   f"{overhead!r}")
    if not isinstance(profile.get("threads"), int) or profile["threads"] < 1:
        raise InputError(path, "machine profile: threads must be a positive integer")
    return profile


def seconds_per_gmac_for(profile: dict[str, Any], width: float, precision: str = "fp32") -> float:
    """Seconds per GMAC at feature width ``width``: linear interpolation in log-width between the measured
    widths, the nearest measured value outside them."""
    table = profile["seconds_per_gmac"].get(precision)
    if not table:
        raise InputError(None, f"machine profile has no {precision} figures")
    widths = sorted(int(w) for w in table)
    values = [float(table[str(w)]) for w in widths]
    return float(np.interp(np.log(width), np.log(widths), values))
