"""The K-frame window along a stack: reflection at the ends, bounded reading, chunked equals whole, the export's
stack metadata, and denoising stack files through the per-file engine."""
from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile

from grainwright.inference.common.errors import InputError
from grainwright.inference.images.imageio import read_text
from grainwright.inference.images.normalization import Normalization
from grainwright.inference.runtime.batch import denoise_files
from grainwright.inference.runtime.modelinfo import read_model_metadata, render_metadata
from grainwright.inference.runtime.runner import OnnxDenoiser
from grainwright.inference.runtime.stack_window import (
    denoise_stack,
    denoise_stack_array,
    denoise_window,
    sliding_windows,
    window_indices,
)

pytest.importorskip("torch")


@pytest.fixture(scope="module")
def stack_model(tmp_path_factory):
    """A randomly initialised 5-frame model exported to ONNX (12-bit data)."""
    from grainwright.models.checkpoint import new_checkpoint, save_checkpoint
    from grainwright.models.export import export_checkpoint

    folder = tmp_path_factory.mktemp("stack-model")
    normalization = Normalization("uint16", 12, 0.0, 4095.0, 1)
    payload = new_checkpoint("unet-stack", 1, normalization, hyper={"frames": 5, "levels": 2, "width": 4}, seed=3,
                             training_noise={"sigma_native": 40.0})
    export_checkpoint(save_checkpoint(folder / "stack.pt", payload), folder / "stack.onnx", threads=1)
    return folder / "stack.onnx"


@pytest.mark.parametrize("frames", [3, 5, 7])
@pytest.mark.parametrize("count", [7, 8, 12])
def test_window_reflects_at_the_ends_like_numpy_pad_reflect(frames, count):
    # Reference: numpy.pad(mode="reflect") of the frame numbers (the end frame is not repeated).
    radius = frames // 2
    padded = np.pad(np.arange(count), radius, mode="reflect")
    for index in range(count):
        assert list(window_indices(index, count, frames)) == list(padded[index:index + frames])
    assert list(window_indices(0, count, 5)) == [2, 1, 0, 1, 2]  # as documented


def test_window_needs_at_least_k_frames():
    with pytest.raises(ValueError, match="needs at least 5 frames, the stack has 4"):
        window_indices(0, 4, 5)


def test_each_frame_is_read_once_and_in_order():
    stack = np.arange(11 * 2 * 3, dtype=np.float32).reshape(11, 2, 3, 1)
    reads = []

    def read(index):
        reads.append(index)
        return stack[index]

    seen = 0
    for index, window in sliding_windows(read, 11, 5):
        assert window.shape == (2, 3, 5)
        assert np.array_equal(window, np.concatenate(list(stack[window_indices(index, 11, 5)]), axis=2))
        seen += 1
    assert seen == 11 and reads == list(range(11))


def test_model_records_its_window_and_axis(stack_model):
    metadata = read_model_metadata(stack_model)
    assert metadata["stack"]["frames"] == 5 and metadata["stack"]["ends"] == "reflect"
    assert metadata["stack"]["axis"] in ("Z", "T", "I") and metadata["format_version"] == 2
    assert "stack window      5 frames" in render_metadata(metadata)
    denoiser = OnnxDenoiser(stack_model, threads=1)
    assert denoiser.spec.stack_frames == 5
    with pytest.raises(InputError, match="reads 5 consecutive frames"):
        denoiser.run(np.zeros((8, 8), np.uint16))


def test_chunked_equals_whole_equals_one_call_per_window(stack_model):
    """Any split of the output frames into chunks, with small tiles in x and y, gives the whole-stack result,
    which equals one untiled ONNX call per reflected window (the reference: numpy.pad reflect along the stack)."""
    denoiser = OnnxDenoiser(stack_model, threads=1, tile=8, batch=3)
    stack = np.random.default_rng(1).uniform(0, 4095, (9, 19, 23, 1)).astype(np.float32)
    whole = denoise_stack_array(denoiser, stack)
    padded = np.pad(stack, ((2, 2), (0, 0), (0, 0), (0, 0)), mode="reflect")
    reference = np.stack([denoiser.run_whole(np.concatenate(list(padded[i:i + 5]), axis=2)) for i in range(9)])
    assert whole.shape == (9, 19, 23, 1)
    assert np.max(np.abs(whole - reference)) / 4095.0 <= 1e-5
    for bounds in ([0, 1, 5, 9], [0, 4, 9], [0, 2, 3, 7, 8, 9]):
        chunks = [denoise_stack_array(denoiser, stack, start, stop) for start, stop in zip(bounds, bounds[1:])]
        assert np.array_equal(np.concatenate(chunks), whole)


def test_strength_blends_with_the_centre_frame(stack_model):
    denoiser = OnnxDenoiser(stack_model, threads=1, strength=0.0)
    stack = np.random.default_rng(2).uniform(0, 4095, (5, 16, 16, 1)).astype(np.float32)
    window = np.concatenate(list(stack), axis=2)
    assert np.allclose(denoise_window(denoiser, window), stack[2], atol=1e-3)


def test_denoise_keeps_volume_axes_spacing_and_dtype(stack_model, tmp_path):
    volume = np.random.default_rng(3).integers(0, 4096, (7, 24, 20)).astype(np.uint16)
    tifffile.imwrite(_mkdir(tmp_path / "in") / "casting.tif", volume,
                     imagej=True, resolution=(10.0, 10.0), metadata={"axes": "ZYX", "spacing": 0.1, "unit": "mm"})
    denoiser = OnnxDenoiser(stack_model, threads=1, tile=16)
    results = list(denoise_files(denoiser, [tmp_path / "in"], tmp_path / "out", fixed_pattern="never"))
    assert [r.status for r in results] == ["done"], results[0].message
    with tifffile.TiffFile(tmp_path / "out" / "casting.tif") as tiff:
        assert tiff.series[0].axes == "ZYX" and tiff.series[0].shape == (7, 24, 20)
        assert tiff.series[0].dtype == np.uint16
        assert tiff.imagej_metadata["spacing"] == 0.1 and tiff.imagej_metadata["unit"] == "mm"
        assert tiff.pages[0].tags["XResolution"].value == (10, 1)
        output = tiff.asarray()
    expected = denoise_stack_array(denoiser, volume[..., None].astype(np.float32))
    assert np.array_equal(output, np.clip(np.rint(expected[..., 0]), 0, 4095).astype(np.uint16))
    record = json.loads(read_text(tmp_path / "out" / "casting.tif"))
    assert record["stack"] == {"frames": 7, "axis": "Z", "window": 5, "ends": "reflect"}
    again = list(denoise_files(denoiser, [tmp_path / "in"], tmp_path / "out", fixed_pattern="never"))
    assert again[0].status == "skipped"


def test_a_stack_with_fewer_frames_than_the_window_fails_naming_the_file(stack_model, tmp_path):
    np.save(_mkdir(tmp_path / "in") / "short.npy", np.zeros((4, 16, 16), np.uint16))
    denoiser = OnnxDenoiser(stack_model, threads=1)
    result = next(denoise_files(denoiser, [tmp_path / "in"], tmp_path / "out"))
    assert result.status == "failed"
    assert "short.npy: has 4 frame(s), fewer than the 5 the model reads per output frame" in result.message
    assert not (tmp_path / "out" / "short.npy").exists()


def test_denoise_stack_refuses_single_frame_models_and_short_stacks(stack_model):
    denoiser = OnnxDenoiser(stack_model, threads=1)
    with pytest.raises(InputError, match="fewer than the 5"):
        next(denoise_stack(denoiser, lambda j: np.zeros((8, 8, 1)), 3))


def _mkdir(path):
    path.mkdir(parents=True, exist_ok=True)
    return path


def test_compare_on_stacks_scores_every_slice(stack_model, tmp_path):
    """Per-slice PSNR/SSIM for a model, the K-frame average and per-frame BM3D, with a slice view. Reference: a
    still scene, where the 5-frame average of independent noise must gain about 10 log10(5) = 7 dB."""
    from grainwright.inference.evaluation.stack_compare import compare_stacks

    rng = np.random.default_rng(5)
    clean = np.tile(np.linspace(800, 3200, 32)[None, None, :], (7, 32, 1)).astype(np.float32)
    noisy = np.clip(np.rint(clean + rng.normal(0, 120, clean.shape)), 0, 4095).astype(np.uint16)
    for folder, stack in (("noisy", noisy), ("clean", clean)):
        _mkdir(tmp_path / folder)
        tifffile.imwrite(tmp_path / folder / "still.tif", stack)
    document = compare_stacks(tmp_path / "noisy", [str(stack_model), "frame-average", "bm3d"], tmp_path / "report",
                              clean_dir=tmp_path / "clean", frames=5)
    means = document["means"]["still.tif"]
    assert set(means) == {str(stack_model), "frame-average", "bm3d"}
    slices = [row for row in document["slices"] if row["method"] == "frame-average"]
    assert len(slices) == 7
    noisy_psnr = 10 * np.log10(4095.0**2 / np.mean((noisy[3].astype(float) - clean[3]) ** 2))
    assert slices[3]["psnr"] - noisy_psnr == pytest.approx(10 * np.log10(5), abs=1.0)
    assert means["bm3d"]["psnr"] > noisy_psnr
    assert (tmp_path / "report" / "slice-views" / "still.png").is_file()
    assert (tmp_path / "report" / "stack-slices.csv").read_text().count("\n") == 1 + 3 * 7
