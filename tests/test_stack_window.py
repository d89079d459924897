"""The K-frame window along a stack: reflection at the ends, bounded reading, chunked equals whole, the export's
stack metadata, and denoising stack files through the per-file engine."""
from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile

from grainwright.inference.common.errors import InputError
from grainwright.inference.images.alignment import ALIGN_REVISIONS
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


@pytest.fixture(scope="module")
def aligned_model(tmp_path_factory):
    """The same kind of 5-frame model, trained (as its summary says) on neighbours aligned by optical flow."""
    from grainwright.models.checkpoint import new_checkpoint, save_checkpoint
    from grainwright.models.export import export_checkpoint

    folder = tmp_path_factory.mktemp("aligned-model")
    normalization = Normalization("uint16", 12, 0.0, 4095.0, 1)
    payload = new_checkpoint("unet-stack", 1, normalization, hyper={"frames": 5, "levels": 2, "width": 4}, seed=3,
                             training_noise={"sigma_native": 40.0},
                             training_summary={"stack_axis": "T", "align_neighbours": "optical-flow",
                                               "align_revision": ALIGN_REVISIONS["optical-flow"]})
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


def test_an_aligned_model_records_it_and_the_runtime_aligns(aligned_model, stack_model):
    """The export writes the alignment and its revision into the stack entry (format version 4, so that a runtime
    that cannot align, or aligns by revision 1, refuses the file, and one of revision 2 refuses it by the revision,
    instead of feeding it other windows than the model was trained on); unaligned models stay at version 2."""
    metadata = read_model_metadata(aligned_model)
    assert metadata["stack"]["align_neighbours"] == "optical-flow" and metadata["format_version"] == 4
    assert metadata["stack"]["align_revision"] == ALIGN_REVISIONS["optical-flow"] == 3
    assert read_model_metadata(stack_model)["stack"]["align_neighbours"] == "none"
    assert "align_revision" not in read_model_metadata(stack_model)["stack"]
    assert "neighbours aligned: optical-flow (revision 3)" in render_metadata(metadata)
    assert OnnxDenoiser(aligned_model, threads=1).spec.stack_alignment == "optical-flow"
    assert OnnxDenoiser(stack_model, threads=1).spec.stack_alignment == "none"


def _assert_windows_chunks_and_whole_agree(denoiser, stack, aligned):
    """The 7-frame ``stack`` denoised whole equals one untiled ONNX call per reflected 5-frame window whose
    neighbours are ``aligned(centre, neighbour)``, differs from the unaligned windows' result, and any split into
    chunks gives the whole-stack result."""
    whole = denoise_stack_array(denoiser, stack)
    reference = [denoiser.run_whole(np.concatenate([aligned(index, p) for p in window_indices(index, 7, 5)], axis=2))
                 for index in range(7)]
    assert np.max(np.abs(whole - np.stack(reference))) / 4095.0 <= 1e-5
    unaligned = np.stack([denoiser.run_whole(np.concatenate(list(stack[window_indices(i, 7, 5)]), axis=2))
                          for i in range(7)])
    assert np.max(np.abs(whole - unaligned)) / 4095.0 > 1e-3
    for bounds in ([0, 1, 5, 7], [0, 3, 7], [0, 2, 4, 6, 7]):
        chunks = [denoise_stack_array(denoiser, stack, start, stop) for start, stop in zip(bounds, bounds[1:])]
        assert np.array_equal(np.concatenate(chunks), whole)


def test_aligned_chunked_equals_whole_equals_one_call_per_aligned_window(aligned_model):
    """With alignment on, any split into chunks gives the whole-stack result, which equals one untiled ONNX call per
    reflected window whose neighbours are warped onto its centre frame: the next frames by the flow estimated between
    them and the centre frame (``neighbour_flow``), the frames two away by that flow composed with the flow of the
    next frame's step onward (``compose_flows``). The steps are kept while the window slides, so this also shows
    that what a chunk computes does not depend on where it starts. The result differs from the unaligned windows'
    (a moving scene: the frames are shifted copies of a smooth random image)."""
    from scipy import ndimage

    from grainwright.inference.images.alignment import compose_flows, neighbour_flow, warp_onto_centre

    denoiser = OnnxDenoiser(aligned_model, threads=1, tile=16, batch=3)
    base = ndimage.gaussian_filter(np.random.default_rng(4).uniform(0, 4095, (40, 48)), 3) * 3
    stack = np.stack([np.roll(base, 2 * i, axis=1) for i in range(7)])[..., None].astype(np.float32)

    def aligned(centre, neighbour):
        if neighbour == centre:
            return stack[centre]
        middle = centre + np.sign(neighbour - centre)
        flow = neighbour_flow(stack[centre], stack[middle])
        if middle != neighbour:
            flow = compose_flows(flow, neighbour_flow(stack[middle], stack[neighbour]))
        return warp_onto_centre(stack[neighbour], flow)

    _assert_windows_chunks_and_whole_agree(denoiser, stack, aligned)


@pytest.mark.parametrize(("revision", "version", "remedy"), [
    (None, 3, "train it again"),  # a summary from before revisions were recorded: revision 1
    (2, 4, "train it again"),
    (4, 4, "update grainwright"),  # a model from a later grainwright
])
def test_a_model_trained_on_another_alignment_revision_is_refused_naming_the_file(tmp_path, revision, version,
                                                                                   remedy):
    """A model records the revision of the alignment it was trained on: revision 1 (no revision in the summary:
    scikit-image's solver, 10 iterations at full resolution, the dense median; format version 3), revision 2 (the
    closed-form solver and the sampled median, every neighbour's flow estimated directly; version 4), or a later one.
    The runtime, revision 3 (the steps between consecutive frames estimated and composed), refuses any other in one
    line naming the file rather than feeding it windows aligned another way."""
    from grainwright.models.checkpoint import new_checkpoint, save_checkpoint
    from grainwright.models.export import export_checkpoint

    summary = {"stack_axis": "T", "align_neighbours": "optical-flow"}
    if revision is not None:
        summary["align_revision"] = revision
    payload = new_checkpoint("unet-stack", 1, Normalization("uint16", 12, 0.0, 4095.0, 1),
                             hyper={"frames": 3, "levels": 2, "width": 4}, seed=5, training_summary=summary)
    export_checkpoint(save_checkpoint(tmp_path / "other.pt", payload), tmp_path / "other.onnx", threads=1)
    model = tmp_path / "other.onnx"
    metadata = read_model_metadata(model)
    assert metadata["format_version"] == version and metadata["stack"]["align_revision"] == (revision or 1)
    assert f"neighbours aligned: optical-flow (revision {revision or 1})" in render_metadata(metadata)
    with pytest.raises(InputError, match=rf"other\.onnx.*revision {revision or 1} of the optical-flow alignment; this "
                                         rf"grainwright computes revision 3.*{remedy}") as refused:
        OnnxDenoiser(model, threads=1)
    assert "\n" not in str(refused.value)


def _shift_aligned_model(folder, revision=None):
    from grainwright.models.checkpoint import new_checkpoint, save_checkpoint
    from grainwright.models.export import export_checkpoint

    summary = {"stack_axis": "T", "align_neighbours": "dominant-shifts",
               "align_revision": revision or ALIGN_REVISIONS["dominant-shifts"]}
    payload = new_checkpoint("unet-stack", 1, Normalization("uint16", 12, 0.0, 4095.0, 1),
                             hyper={"frames": 5, "levels": 2, "width": 4}, seed=3, training_summary=summary)
    export_checkpoint(save_checkpoint(folder / "shifts.pt", payload), folder / "shifts.onnx", threads=1)
    return folder / "shifts.onnx"


def test_a_model_aligned_by_dominant_shifts_runs_chunked_as_whole_as_one_call_per_window(tmp_path):
    """``align_neighbours = "dominant-shifts"``: written at format version 5 (an older runtime refuses the file by
    its version instead of feeding it windows aligned otherwise); the runtime moves each neighbour by the whole-pixel
    motion between consecutive frames (``pair_shifts``, composed for the frames two away), so the result equals one
    untiled ONNX call per such window, any split into chunks gives the whole-stack result, and it differs from the
    unaligned windows' (the frames are copies of a smooth random image moved 2 pixels per frame)."""
    from scipy import ndimage

    from grainwright.inference.images.shift_alignment import (PreparedFrame, compose_shifts, pair_shifts,
                                                               warp_by_shifts)

    model = _shift_aligned_model(tmp_path)
    metadata = read_model_metadata(model)
    assert metadata["format_version"] == 5 and metadata["stack"]["align_neighbours"] == "dominant-shifts"
    assert "neighbours aligned: dominant-shifts (revision 1)" in render_metadata(metadata)
    denoiser = OnnxDenoiser(model, threads=1, tile=16, batch=3)
    rng = np.random.default_rng(4)
    base = ndimage.gaussian_filter(rng.uniform(0, 4095, (40, 48)), 2) * 3
    stack = np.stack([np.roll(base, 2 * i, axis=1) + rng.normal(0, 20, base.shape)
                      for i in range(7)])[..., None].astype(np.float32)

    def motion(start, end):  # each pair searched from its lower index, as the runtime does
        forward, backward = pair_shifts(PreparedFrame(stack[min(start, end)]), PreparedFrame(stack[max(start, end)]))
        return forward if start < end else backward

    def aligned(centre, neighbour):
        if neighbour == centre:
            return stack[centre]
        middle = centre + np.sign(neighbour - centre)
        flow = motion(centre, middle)
        if middle != neighbour:
            flow = compose_shifts(flow, motion(middle, neighbour))
        return warp_by_shifts(stack[neighbour], flow)

    _assert_windows_chunks_and_whole_agree(denoiser, stack, aligned)


def test_a_later_revision_of_the_dominant_shifts_is_refused_naming_the_file(tmp_path):
    model = _shift_aligned_model(tmp_path, revision=2)
    with pytest.raises(InputError, match=r"shifts\.onnx.*revision 2 of the dominant-shifts alignment; this grainwright "
                                         r"computes revision 1.*update grainwright") as refused:
        OnnxDenoiser(model, threads=1)
    assert "\n" not in str(refused.value)


def test_an_unknown_alignment_in_the_file_is_refused_naming_it(aligned_model, tmp_path):
    import onnx

    model = onnx.load(aligned_model)
    entry = next(e for e in model.metadata_props if e.key == "grainwright")
    metadata = json.loads(entry.value)
    metadata["stack"]["align_neighbours"] = "block-matching"
    entry.value = json.dumps(metadata)
    onnx.save(model, tmp_path / "odd.onnx")
    with pytest.raises(InputError, match=r"odd\.onnx.*unknown neighbour alignment 'block-matching'"):
        OnnxDenoiser(tmp_path / "odd.onnx", threads=1)


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


@pytest.fixture(scope="module")
def single_model(tmp_path_factory):
    """A randomly initialised single-frame model of the same data (12-bit)."""
    from grainwright.models.checkpoint import new_checkpoint, save_checkpoint
    from grainwright.models.export import export_checkpoint

    folder = tmp_path_factory.mktemp("single-model")
    payload = new_checkpoint("unet-small", 1, Normalization("uint16", 12, 0.0, 4095.0, 1),
                             hyper={"levels": 2, "width": 4}, seed=4)
    export_checkpoint(save_checkpoint(folder / "single.pt", payload), folder / "single.onnx", threads=1)
    return folder / "single.onnx"


def test_slice_wise_denoises_each_slice_alone_and_keeps_the_volume_metadata(single_model, stack_model, tmp_path):
    """Each output slice equals the single-frame model on that slice alone (the frame-by-frame runner path,
    ``OnnxDenoiser.run``); axes, spacing and dtype are kept; a multi-frame model is refused by name."""
    from grainwright.console.cli import main

    volume = np.random.default_rng(6).integers(0, 4096, (4, 24, 20)).astype(np.uint16)
    tifffile.imwrite(_mkdir(tmp_path / "in") / "thick.tif", volume,
                     imagej=True, resolution=(10.0, 10.0), metadata={"axes": "ZYX", "spacing": 2.5, "unit": "mm"})
    assert main(["denoise", str(single_model), str(tmp_path / "in"), "-o", str(tmp_path / "out"), "--slice-wise",
                 "--fixed-pattern", "never", "--tile", "16", "--threads", "1", "-q"]) == 0
    denoiser = OnnxDenoiser(single_model, threads=1, tile=16)
    with tifffile.TiffFile(tmp_path / "out" / "thick.tif") as tiff:
        assert tiff.series[0].axes == "ZYX" and tiff.imagej_metadata["spacing"] == 2.5
        output = tiff.asarray()
    for index, slice_ in enumerate(volume):
        alone = denoiser.run(slice_[..., None], as_float=True)[..., 0]
        assert np.array_equal(output[index], np.clip(np.rint(alone), 0, 4095).astype(np.uint16))
    assert json.loads(read_text(tmp_path / "out" / "thick.tif"))["stack"]["window"] == 1
    with pytest.raises(InputError, match="stack.onnx: reads 5 frames per output frame; slice-wise"):
        list(denoise_files(OnnxDenoiser(stack_model, threads=1), [tmp_path / "in"], tmp_path / "other",
                           slice_wise=True))


def _frame_folder(folder, stack, numbers=None):
    _mkdir(folder)
    for number, frame in zip(numbers or range(len(stack)), stack):
        tifffile.imwrite(folder / f"frame_{number:03d}.tif", frame)
    return folder


def test_a_folder_of_numbered_frames_is_denoised_as_one_stack(stack_model, tmp_path):
    """``--frame-folders``: the folder's frames in name order slide through the window exactly as the same stack
    in one file does, and come out as one stack file named after the folder; a rerun skips it."""
    from grainwright.console.cli import main

    stack = np.random.default_rng(7).integers(0, 4096, (6, 16, 16)).astype(np.uint16)
    _frame_folder(tmp_path / "in" / "burst", stack)
    arguments = ["denoise", str(stack_model), str(tmp_path / "in" / "burst"), "-o", str(tmp_path / "out"),
                 "--frame-folders", "--fixed-pattern", "never", "--threads", "1", "-q"]
    assert main(arguments) == 0
    denoiser = OnnxDenoiser(stack_model, threads=1)
    expected = denoise_stack_array(denoiser, stack[..., None].astype(np.float32))[..., 0]
    output = tifffile.imread(tmp_path / "out" / "burst.tif")
    assert np.array_equal(output, np.clip(np.rint(expected), 0, 4095).astype(np.uint16))
    assert main(arguments + ["--format", "npy"]) == 0
    assert np.array_equal(np.load(tmp_path / "out" / "burst.npy"), output)
    again = list(denoise_files(denoiser, [tmp_path / "in" / "burst"], tmp_path / "out", frame_folders=True,
                               fixed_pattern="never"))
    assert again[0].status == "skipped"


@pytest.mark.parametrize(("numbers", "shapes", "message"), [
    ((0, 1, 2, 4, 5, 6), None, "frame_004.tif: gap in the frame numbering: frame_002.tif is followed by"),
    (None, (16, 16, 16, 16, 12, 16), "frame_004.tif"),
    ((0, 1, 2, 3), None, "burst: has 4 frame(s), fewer than the 5 the model reads per output frame"),
])
def test_a_bad_folder_of_frames_fails_naming_the_file(stack_model, tmp_path, capsys, numbers, shapes, message):
    from grainwright.console.cli import main

    count = len(numbers) if numbers else 6
    rng = np.random.default_rng(8)
    stack = [rng.integers(0, 4096, (edge, 16)).astype(np.uint16) for edge in (shapes or (16,) * count)]
    _frame_folder(tmp_path / "in" / "burst", stack, numbers)
    assert main(["denoise", str(stack_model), str(tmp_path / "in" / "burst"), "-o", str(tmp_path / "out"),
                 "--frame-folders", "--threads", "1", "-q"]) == 1
    captured = capsys.readouterr()
    assert message in captured.err and "failed 1" in captured.out
    assert not (tmp_path / "out" / "burst.tif").exists()


def test_a_folder_of_frames_is_not_written_as_png(stack_model, tmp_path):
    _frame_folder(tmp_path / "in" / "burst", np.zeros((6, 16, 16), np.uint16))
    with pytest.raises(InputError, match="burst: a folder of frames is written as one stack file"):
        list(denoise_files(OnnxDenoiser(stack_model, threads=1), [tmp_path / "in" / "burst"], tmp_path / "out",
                           frame_folders=True, out_format="png"))
