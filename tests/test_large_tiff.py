"""Large TIFFs read piecewise and written tile by tile; tifffile's whole-file reader is the reference."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import tifffile
from test_runner import NATIVE_HIGH, build_conv_model

from grainwright.inference.common.errors import InputError
from grainwright.inference.images import large_tiff
from grainwright.inference.images.large_tiff import (
    TiffRowReader,
    can_stream,
    write_tiled_tiff,
)
from grainwright.inference.runtime.batch import denoise_files
from grainwright.inference.runtime.runner import OnnxDenoiser

LAYOUTS = [
    {"tile": (32, 32)},
    {"tile": (16, 48), "compression": "zlib"},
    {"rowsperstrip": 5, "compression": "zlib"},
    {"rowsperstrip": 7, "compression": "zlib", "predictor": True},
    {},  # tifffile's default: one uncompressed strip
    {"planarconfig": "separate", "rowsperstrip": 9, "compression": "zlib"},
    {"planarconfig": "separate", "tile": (16, 16)},
]


def _write(path: Path, frames: np.ndarray, layout: dict) -> Path:
    layout = dict(layout)
    separate = layout.get("planarconfig") == "separate"
    if frames.shape[-1] > 1:
        layout.setdefault("planarconfig", "contig")
    with tifffile.TiffWriter(path) as tiff:
        for frame in frames:
            data = np.moveaxis(frame, 2, 0) if separate else (frame if frame.shape[2] > 1 else frame[:, :, 0])
            tiff.write(data, photometric="minisblack", metadata=None, **layout)
    return path


@pytest.mark.parametrize("layout", LAYOUTS)
@pytest.mark.parametrize("channels,dtype", [(1, np.uint16), (3, np.uint8), (2, np.float32)])
def test_rows_match_tifffile_whole_file_read(tmp_path, layout, channels, dtype):
    if layout.get("planarconfig") == "separate" and channels == 1:
        pytest.skip("planar configuration only matters with several channels")
    if layout.get("predictor") and dtype == np.float32:
        pytest.skip("tifffile needs the imagecodecs package for the floating-point predictor")
    frames = (np.random.default_rng(0).random((2, 77, 53, channels)) * 200).astype(dtype)
    path = _write(tmp_path / "in.tif", frames, layout)
    reference = tifffile.imread(path)  # tifffile decodes the whole file: the reference
    if layout.get("planarconfig") == "separate":
        reference = np.moveaxis(reference, -3, -1)
    reference = reference.reshape(frames.shape)
    with TiffRowReader(path) as reader:
        assert reader.shape == (77, 53, channels) and reader.frames == 2
        for frame in range(2):
            for y0, y1 in [(0, 77), (3, 40), (76, 77), (30, 31)]:
                np.testing.assert_array_equal(reader.read_rows(frame, y0, y1), reference[frame, y0:y1])


def test_whole_strip_compressed_page_is_left_to_the_whole_file_reader(tmp_path, monkeypatch):
    monkeypatch.setattr(large_tiff, "STREAM_FROM_PIXELS", 1)
    image = np.zeros((64, 64), np.uint16)
    path = tmp_path / "one-strip.tif"
    tifffile.imwrite(path, image, compression="zlib", rowsperstrip=64)
    assert not can_stream(path)
    with pytest.raises(InputError, match="cannot be read piecewise"):
        TiffRowReader(path)
    tifffile.imwrite(tmp_path / "tiled.tif", image, tile=(32, 32))
    assert can_stream(tmp_path / "tiled.tif")


def test_tiled_writer_round_trips_and_leaves_no_temporary(tmp_path):
    frames = (np.random.default_rng(1).random((2, 70, 45, 3)) * 60000).astype(np.uint16)

    def tiles(frame):
        for y in range(0, 70, 32):
            for x in range(0, 45, 32):
                yield frame[y : y + 32, x : x + 32]

    out = write_tiled_tiff(tmp_path / "out.tif", (tiles(f) for f in frames), shape=(70, 45, 3), dtype=np.uint16,
                           tile=(32, 32), description='{"note": 1}', compression="zlib", count=2)
    np.testing.assert_array_equal(tifffile.imread(out), frames)
    with tifffile.TiffFile(out) as tiff:
        assert tiff.pages[0].is_tiled and tiff.pages[0].description == '{"note": 1}'
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.tif"]
    with pytest.raises(InputError, match="already exists"):
        write_tiled_tiff(out, [], shape=(70, 45, 3), dtype=np.uint16, tile=(32, 32))


def test_interrupted_write_leaves_nothing(tmp_path):
    def failing():
        yield np.zeros((16, 16, 1), np.uint16)
        raise RuntimeError("killed")

    with pytest.raises(RuntimeError):
        write_tiled_tiff(tmp_path / "out.tif", [failing()], shape=(40, 40, 1), dtype=np.uint16, tile=(16, 16))
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("layout", [{"tile": (32, 32), "compression": "zlib"}, {"rowsperstrip": 3}, {}])
def test_streamed_denoise_equals_in_memory_run(tmp_path, monkeypatch, layout):
    monkeypatch.setattr(large_tiff, "STREAM_FROM_PIXELS", 1)
    model = build_conv_model(tmp_path / "m.onnx", pooled=True)
    rng = np.random.default_rng(2)
    frames = rng.uniform(0, NATIVE_HIGH, (2, 83, 61, 1)).astype(np.uint16)
    (tmp_path / "in").mkdir()
    source = _write(tmp_path / "in" / "stack.tif", frames, layout)
    denoiser = OnnxDenoiser(model, threads=1, tile=20)
    [result] = denoise_files(denoiser, [source], tmp_path / "out")
    assert result.status == "done", result.message
    written = tifffile.imread(result.output)
    with tifffile.TiffFile(result.output) as tiff:
        assert tiff.pages[0].is_tiled  # the streaming writer was used
    for frame, out in zip(frames, written):
        np.testing.assert_array_equal(out[:, :, None], denoiser.run(frame))


def test_streamed_noise_map_model_estimates_sigma_per_frame(tmp_path, monkeypatch):
    # The streamed path estimates the map's level per frame on the central sample (here the whole small frame),
    # as the in-memory run does on the whole frame, and names the sample's size in the file's warnings.
    monkeypatch.setattr(large_tiff, "STREAM_FROM_PIXELS", 1)
    model = build_conv_model(tmp_path / "m.onnx", noise_map=True)
    rng = np.random.default_rng(3)
    frames = np.clip(rng.normal(NATIVE_HIGH / 2, NATIVE_HIGH / 20, (2, 83, 61, 1)), 0, NATIVE_HIGH).astype(np.uint16)
    frames[1] //= 2  # a different level per frame
    (tmp_path / "in").mkdir()
    source = _write(tmp_path / "in" / "stack.tif", frames, {"tile": (32, 32)})
    denoiser = OnnxDenoiser(model, threads=1, tile=20, noise_sigma="estimate")
    [result] = denoise_files(denoiser, [source], tmp_path / "out")
    assert result.status == "done", result.message
    assert "estimated per frame on the central 83 x 61 pixels" in result.warnings
    written = tifffile.imread(result.output)
    for frame, out in zip(frames, written):
        np.testing.assert_array_equal(out[:, :, None], denoiser.run(frame))
