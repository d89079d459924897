"""Stack and volume files: exact round trips with their axis metadata (tifffile as the reference writer and reader),
frame-by-frame reading, folders of numbered frames, and one-line errors naming the file."""
from __future__ import annotations

import numpy as np
import pytest
import tifffile

from grainwright.inference.common.errors import InputError
from grainwright.inference.images.imageio import read_text
from grainwright.inference.images.stacks import numbered_frames, open_stack, read_stack, write_stack


def _volume(dtype=np.uint16, shape=(9, 21, 34), seed=0):
    rng = np.random.default_rng(seed)
    if np.dtype(dtype).kind == "f":
        return rng.normal(0.0, 1.0, shape).astype(dtype)
    info = np.iinfo(dtype)
    return rng.integers(info.min, info.max, shape, endpoint=True).astype(dtype)


def _roundtrip(source, target):
    frames, info = read_stack(source)
    write_stack(target, iter(frames), info, text='{"note": "kept"}')
    return frames, info


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32])
def test_imagej_volume_round_trips_exactly_with_its_spacing(tmp_path, dtype):
    # Reference writer and reader: tifffile's ImageJ hyperstack (axes ZYX, slice spacing, unit, X/Y resolution).
    volume = _volume(dtype)
    tifffile.imwrite(tmp_path / "in.tif", volume, imagej=True, resolution=(1 / 0.25, 1 / 0.5),
                     metadata={"axes": "ZYX", "spacing": 0.8, "unit": "um"})
    frames, info = _roundtrip(tmp_path / "in.tif", tmp_path / "out.tif")
    assert np.array_equal(frames[..., 0], volume) and frames.dtype == volume.dtype
    assert (info.axis, info.flavour, info.spacing) == ("Z", "imagej", {"X": 0.25, "Y": 0.5, "Z": 0.8})
    with tifffile.TiffFile(tmp_path / "in.tif") as before, tifffile.TiffFile(tmp_path / "out.tif") as after:
        assert after.series[0].axes == before.series[0].axes == "ZYX"
        assert after.series[0].shape == before.series[0].shape and after.series[0].dtype == volume.dtype
        assert np.array_equal(after.asarray(), volume)
        kept = {key: after.imagej_metadata[key] for key in ("spacing", "unit", "slices")}
        assert kept == {key: before.imagej_metadata[key] for key in ("spacing", "unit", "slices")}
        for tag in ("XResolution", "YResolution", "ResolutionUnit"):
            assert after.pages[0].tags[tag].value == before.pages[0].tags[tag].value
    assert read_text(tmp_path / "out.tif") == '{"note": "kept"}'  # the ImageJ Info property


def test_imagej_time_series_keeps_its_frame_interval(tmp_path):
    sequence = _volume(np.uint16, (6, 16, 16))
    tifffile.imwrite(tmp_path / "in.tif", sequence, imagej=True, metadata={"axes": "TYX", "finterval": 0.04})
    _, info = _roundtrip(tmp_path / "in.tif", tmp_path / "out.tif")
    assert info.axis == "T" and info.spacing == {"T": 0.04}
    with tifffile.TiffFile(tmp_path / "out.tif") as after:
        assert after.series[0].axes == "TYX" and after.imagej_metadata["finterval"] == 0.04
        assert np.array_equal(after.asarray(), sequence)


def test_ome_volume_round_trips_exactly_with_physical_sizes(tmp_path):
    volume = _volume(np.int16)
    metadata = {"axes": "ZYX", "PhysicalSizeX": 0.5, "PhysicalSizeY": 0.5, "PhysicalSizeZ": 2.0,
                "PhysicalSizeZUnit": "mm"}
    tifffile.imwrite(tmp_path / "in.ome.tif", volume, ome=True, metadata=metadata)
    frames, info = _roundtrip(tmp_path / "in.ome.tif", tmp_path / "out.ome.tif")
    assert info.flavour == "ome" and info.spacing == {"X": 0.5, "Y": 0.5, "Z": 2.0} and info.units == {"Z": "mm"}
    with tifffile.TiffFile(tmp_path / "out.ome.tif") as after:
        assert after.is_ome and after.series[0].axes == "ZYX" and after.series[0].dtype == np.int16
        assert np.array_equal(after.asarray(), volume)
        pixels = tifffile.xml2dict(after.ome_metadata)["OME"]["Image"]["Pixels"]
        assert (pixels["PhysicalSizeZ"], pixels["PhysicalSizeZUnit"], pixels["PhysicalSizeX"]) == (2.0, "mm", 0.5)
    assert read_text(tmp_path / "out.ome.tif") == '{"note": "kept"}'  # the OME Image/Description


@pytest.mark.parametrize("suffix", [".tif", ".npy"])
def test_plain_stacks_round_trip_exactly_with_channels(tmp_path, suffix):
    stack = _volume(np.uint8, (5, 12, 10, 3))
    if suffix == ".npy":
        np.save(tmp_path / "in.npy", stack)
    else:
        tifffile.imwrite(tmp_path / "in.tif", stack, photometric="rgb")
    frames, info = _roundtrip(tmp_path / f"in{suffix}", tmp_path / f"out{suffix}")
    assert info.shape == (5, 12, 10, 3) and np.array_equal(frames, stack)
    back = np.load(tmp_path / "out.npy") if suffix == ".npy" else tifffile.imread(tmp_path / "out.tif")
    assert back.dtype == np.uint8 and np.array_equal(back, stack)


def test_frames_are_read_one_at_a_time_from_planar_channel_stacks(tmp_path):
    # ImageJ keeps channels as planes (ZCYX); a frame gathers its C planes.
    volume = _volume(np.uint16, (4, 2, 8, 9))
    tifffile.imwrite(tmp_path / "zcyx.tif", volume, imagej=True, metadata={"axes": "ZCYX"})
    with open_stack(tmp_path / "zcyx.tif") as reader:
        assert reader.info.shape == (4, 8, 9, 2)
        assert np.array_equal(reader.read(3), np.moveaxis(volume[3], 0, -1))


def test_a_folder_of_numbered_frames_reads_in_name_order(tmp_path):
    frames = _volume(np.uint16, (4, 10, 12))
    for index, frame in enumerate(frames):
        tifffile.imwrite(tmp_path / f"part_{index + 7:04d}.tif", frame)
    assert [path.name for path in numbered_frames(tmp_path)][0] == "part_0007.tif"
    stack, info = read_stack(tmp_path)
    assert info.flavour == "folder" and np.array_equal(stack[..., 0], frames)


def test_a_gap_in_the_numbering_names_the_file_after_it(tmp_path):
    for number in (1, 2, 4, 5):
        tifffile.imwrite(tmp_path / f"frame_{number:03d}.tif", np.zeros((4, 4), np.uint8))
    with pytest.raises(InputError, match="gap in the frame numbering: frame_002.tif is followed by frame_004.tif "
                                         r"\(frame 3 missing\)") as error:
        open_stack(tmp_path)
    assert error.value.path.name == "frame_004.tif"


def test_unpadded_numbers_out_of_name_order_are_refused(tmp_path):
    for number in (1, 2, 10):
        tifffile.imwrite(tmp_path / f"f{number}.tif", np.zeros((4, 4), np.uint8))
    with pytest.raises(InputError, match="zero-padded"):
        open_stack(tmp_path)


def test_folder_frames_of_different_shapes_name_the_odd_file(tmp_path):
    tifffile.imwrite(tmp_path / "f_1.tif", np.zeros((4, 4), np.uint8))
    tifffile.imwrite(tmp_path / "f_2.tif", np.zeros((4, 5), np.uint8))
    with pytest.raises(InputError, match="f_2.tif: frame is 4x5x1 uint8, but f_1.tif is 4x4x1 uint8"):
        open_stack(tmp_path)


def test_tiff_frames_of_different_shapes_are_refused(tmp_path):
    with tifffile.TiffWriter(tmp_path / "mixed.tif") as tiff:
        tiff.write(np.zeros((8, 8), np.uint16))
        tiff.write(np.zeros((8, 9), np.uint16))
    with pytest.raises(InputError, match="mixed.tif: frames have different shapes"):
        open_stack(tmp_path / "mixed.tif")


def test_two_stack_axes_in_one_file_are_refused(tmp_path):
    tifffile.imwrite(tmp_path / "tz.tif", np.zeros((2, 3, 4, 4), np.uint8), imagej=True, metadata={"axes": "TZYX"})
    with pytest.raises(InputError, match="tz.tif: has 2 stack axes"):
        open_stack(tmp_path / "tz.tif")


def test_writer_refuses_to_overwrite_and_leaves_nothing_on_a_short_stack(tmp_path):
    stack = _volume(np.uint16, (3, 4, 4))
    np.save(tmp_path / "in.npy", stack)
    frames, info = read_stack(tmp_path / "in.npy")
    with pytest.raises(InputError, match="only 2 of the 3 frames"):
        write_stack(tmp_path / "out.tif", iter(frames[:2]), info)
    assert list(tmp_path.iterdir()) == [tmp_path / "in.npy"]  # no half-written output, no temporary left
    with pytest.raises(InputError, match="already exists"):
        write_stack(tmp_path / "in.npy", iter(frames), info)
