"""Hostile and huge images: every reader checks the declared size before decoding; the piecewise paths read only
what they need. Peak memory is measured in a child process (its peak resident set, ``ru_maxrss``)."""
from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import tifffile
from hostile_files import png16_bomb, sparse_npy_bomb, strip_tiff_bomb, tiled_tiff_bomb, zero_stream
from PIL import Image
from test_runner import build_conv_model

from grainwright.console.cli import main
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.images import limits
from grainwright.inference.images.imageio import read_centre_of_file, read_frames, write_image
from grainwright.inference.images.large_tiff import TiffRowReader, can_stream

ONE_GIB = 1 << 30
PEAK_LIMIT_MIB = 1024  # the bound for a refused or piecewise-read hostile file
# Safety net for the shared test machine: a regression that decodes a bomb fails on this address-space cap
# instead of taking 7 GB of memory (the child's peak resident set is what the tests assert on).
ADDRESS_SPACE_CAP = 4 * ONE_GIB

_MEASURE = textwrap.dedent("""
    import json, resource, subprocess, sys

    def cap():
        resource.setrlimit(resource.RLIMIT_AS, ({cap}, {cap}))

    done = subprocess.run(sys.argv[1:], capture_output=True, text=True, preexec_fn=cap)
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss  # KiB on Linux, of the only child
    print(json.dumps({{"rc": done.returncode, "out": done.stdout, "err": done.stderr, "peak_mib": peak / 1024}}))
""").format(cap=ADDRESS_SPACE_CAP)


def measured(*argv: str) -> dict:
    """Run ``argv`` in a grandchild and return its exit code, output and peak resident memory (MiB)."""
    done = subprocess.run([sys.executable, "-c", _MEASURE, *argv], capture_output=True, text=True, check=True)
    return json.loads(done.stdout)


def grainwright(*args: object) -> list[str]:
    return [sys.executable, "-m", "grainwright.console.cli", *map(str, args)]


def python(code: str) -> list[str]:
    return [sys.executable, "-c", textwrap.dedent(code)]


def one_error_line(err: str, path: Path) -> str:
    lines = [line for line in err.splitlines() if str(path) in line]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


@pytest.fixture(autouse=True)
def default_limits(monkeypatch):
    monkeypatch.delenv(limits.PIXELS_VARIABLE, raising=False)
    monkeypatch.delenv(limits.DECODED_VARIABLE, raising=False)


def test_the_default_frame_limit_is_pillows():
    # Outside reference: Pillow's own decompression-bomb threshold.
    assert limits.DEFAULT_MAX_PIXELS == Image.MAX_IMAGE_PIXELS == 89_478_485


def test_the_zero_stream_helper_inflates_to_what_it_says():
    # zlib itself (RFC 1950 checksum included) is the reference for the hand-made stream.
    import zlib

    for size in (0, 7, (1 << 24) + 3):
        assert zlib.decompress(zero_stream(size)) == bytes(size)


def test_a_16_bit_colour_png_declaring_gigapixels_is_refused_before_inflating(tmp_path):
    # 1 MB on disk: declares 40000 x 40000 RGB 16-bit (8.9 GiB) and holds 1 GiB of compressed zeros, which the
    # project's own 16-bit colour decoder used to inflate first (measured: 2.1 GB peak, then "truncated").
    bomb = png16_bomb(tmp_path / "bomb.png", 40000, 40000, ONE_GIB)
    result = measured(*grainwright("inspect", bomb))
    line = one_error_line(result["err"], bomb)
    assert "40000 x 40000 pixels, 3 channels, uint16" in line and limits.PIXELS_VARIABLE in line
    assert result["rc"] == 1 and result["peak_mib"] < PEAK_LIMIT_MIB


def test_a_png_stream_longer_than_its_header_is_refused_without_inflating_it_all(tmp_path):
    # Declares a modest 1000 x 1000 RGB 16-bit image (6 MB) but its data inflates to 1 GiB.
    bomb = png16_bomb(tmp_path / "long.png", 1000, 1000, ONE_GIB)
    result = measured(*python(f"""
        from grainwright.inference.images.imageio import read_frames
        read_frames({str(bomb)!r})
    """))
    assert "image data longer than the header says" in result["err"]
    assert result["peak_mib"] < PEAK_LIMIT_MIB


def test_a_compressed_single_strip_tiff_of_60000_squared_is_refused_by_inspect_and_denoise(tmp_path):
    # 1 MB on disk, 60000 x 60000 uint16 (6.7 GiB) in one deflate strip: it cannot be read piecewise.
    bomb = strip_tiff_bomb(tmp_path / "strip.tif", inflated=ONE_GIB)
    assert not can_stream(bomb)
    inspected = measured(*grainwright("inspect", bomb))
    line = one_error_line(inspected["err"], bomb)
    assert "declares 60000 x 60000 pixels, 1 channel, uint16" in line and "6.7 GiB" in line
    assert inspected["rc"] == 1 and inspected["peak_mib"] < PEAK_LIMIT_MIB
    model = build_conv_model(tmp_path / "m.onnx")
    denoised = measured(*grainwright("denoise", model, bomb, "-o", tmp_path / "out", "-q", "--threads", "1"))
    line = one_error_line(denoised["err"], bomb)
    assert line.startswith("failed:") and "declares 60000 x 60000 pixels" in line
    assert denoised["rc"] == 1 and denoised["peak_mib"] < PEAK_LIMIT_MIB


def test_a_tiled_tiff_of_60000_squared_is_inspected_on_its_central_crop(tmp_path):
    # 0.4 MB on disk: 13924 tiles of 512 x 512 all pointing at one tile of noise around 1000.
    bomb = tiled_tiff_bomb(tmp_path / "tiled.tif")
    assert can_stream(bomb)
    result = measured(*grainwright("inspect", bomb, "--json"))
    assert result["rc"] == 0, result["err"]
    image = json.loads(result["out"])["images"][0]
    assert image["shape"] == [60000, 60000, 1] and image["analysed_shape"] == [2048, 2048, 1]
    assert 900 < image["minimum"] < image["maximum"] < 1100
    assert result["peak_mib"] < PEAK_LIMIT_MIB
    # read whole, it is refused by name and size, with the piecewise paths named
    with pytest.raises(InputError, match="denoise reads it in bands and inspect its central crop"):
        read_frames(bomb)


def test_denoise_reads_a_huge_tiled_tiff_in_bands(tmp_path):
    # denoise streams such a file band by band (a whole run would take an hour): one band of 512 rows of the
    # 60000-pixel-wide frame is what it holds at a time.
    bomb = tiled_tiff_bomb(tmp_path / "tiled.tif")
    result = measured(*python(f"""
        from grainwright.inference.images.large_tiff import TiffRowReader
        with TiffRowReader({str(bomb)!r}) as reader:
            band = reader.read_rows(0, 30000, 30512)
            assert band.shape == (512, 60000, 1) and 900 < band.mean() < 1100, band.shape
        print("ok")
    """))
    assert result["out"].strip() == "ok", result["err"]
    assert result["peak_mib"] < PEAK_LIMIT_MIB


def test_a_sparse_npy_of_60000_squared_is_refused_whole_and_cropped_by_inspect(tmp_path):
    # 7.2 GB on paper, nothing on disk (a sparse hole): numpy used to read it whole.
    bomb = sparse_npy_bomb(tmp_path / "big.npy")
    refused = measured(*grainwright("denoise", build_conv_model(tmp_path / "m.onnx"), bomb, "-o", tmp_path / "o",
                                    "-q", "--threads", "1"))
    assert "declares 60000 x 60000 pixels" in one_error_line(refused["err"], bomb)
    assert refused["peak_mib"] < PEAK_LIMIT_MIB
    inspected = measured(*grainwright("inspect", bomb, "--json"))
    assert json.loads(inspected["out"])["images"][0]["shape"] == [60000, 60000, 1]
    assert inspected["peak_mib"] < PEAK_LIMIT_MIB


def test_a_truncated_npy_is_named_truncated_before_anything_is_allocated(tmp_path):
    path = tmp_path / "short.npy"
    np.save(path, np.zeros((64, 64), np.uint16))
    path.write_bytes(path.read_bytes()[:-100])
    with pytest.raises(InputError, match="truncated .npy file"):
        read_frames(path)


def test_the_limits_are_raised_and_lowered_by_environment_variables(tmp_path, monkeypatch):
    small = write_image(tmp_path / "small.png", np.full((30, 40, 3), 7, np.uint16))
    stack = write_image(tmp_path / "stack.tif", np.zeros((20, 256, 256, 1), np.uint16))  # 2.5 MiB decoded
    assert read_frames(small).shape == (1, 30, 40, 3) and read_frames(stack).shape == (20, 256, 256, 1)
    monkeypatch.setenv(limits.PIXELS_VARIABLE, "1_000")
    with pytest.raises(InputError, match=r"30 x 40 pixels, 3 channels, uint16 .* limit of 1,000 pixels"):
        read_frames(small)
    monkeypatch.setenv(limits.PIXELS_VARIABLE, "70000")
    assert read_frames(stack).shape == (20, 256, 256, 1)  # each frame is within the frame limit
    monkeypatch.setenv(limits.DECODED_VARIABLE, "1")
    with pytest.raises(InputError, match=f"20 frames of 256 x 256 .* 1 MiB decoded per file .*{limits.DECODED_VARIABLE}"):
        read_frames(stack)
    monkeypatch.setenv(limits.PIXELS_VARIABLE, "nonsense")
    with pytest.raises(ConfigError, match=f"{limits.PIXELS_VARIABLE} must be a positive whole number"):
        read_frames(small)
    assert main(["inspect", str(small)]) == 1  # one line per file, not a traceback


def test_a_raised_limit_carries_over_to_pillow(tmp_path, monkeypatch):
    # Pillow refuses images over twice its MAX_IMAGE_PIXELS; with ours raised above it, ours governs.
    path = tmp_path / "grey.png"
    Image.fromarray(np.full((100, 100), 9, np.uint8)).save(path)
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 1000)
    with pytest.raises(Image.DecompressionBombError):
        Image.open(path).load()
    monkeypatch.setenv(limits.PIXELS_VARIABLE, "20000")
    assert read_frames(path).shape == (1, 100, 100, 1)


def test_a_tiff_whose_tiles_exceed_the_frame_limit_is_not_read_piecewise(tmp_path, monkeypatch):
    path = tmp_path / "tiled.tif"
    tifffile.imwrite(path, np.zeros((2048, 2048), np.uint16), tile=(1024, 1024), compression="zlib")
    assert can_stream(path)
    monkeypatch.setenv(limits.PIXELS_VARIABLE, str(1024 * 1024 - 1))
    assert not can_stream(path)
    with pytest.raises(InputError, match="declares 2048 x 2048"):
        read_frames(path)


@pytest.mark.parametrize("layout", [{"tile": (64, 48)}, {"rowsperstrip": 7}])
def test_a_block_read_piecewise_equals_the_same_block_of_the_whole_image(tmp_path, layout):
    # tifffile's whole-image decoder is the reference for our strip/tile reader.
    image = np.random.default_rng(3).integers(0, 4000, (2100, 2000, 2)).astype(np.uint16)
    path = tmp_path / "image.tif"
    tifffile.imwrite(path, image, compression="zlib", planarconfig="contig", photometric="minisblack", **layout)
    assert can_stream(path)
    with TiffRowReader(path) as reader:
        np.testing.assert_array_equal(reader.read_block(0, 1001, 1130, 333, 1777), image[1001:1130, 333:1777])
    crop = read_centre_of_file(path, 100, frames=2)
    assert crop.piecewise and crop.count == 1 and crop.shape == (2100, 2000, 2)
    np.testing.assert_array_equal(crop.frames[0], image[1000:1100, 950:1050])


def test_a_npy_crop_read_row_by_row_equals_numpys(tmp_path):
    stack = np.random.default_rng(4).normal(size=(3, 50, 70, 2)).astype(np.float32)
    path = tmp_path / "stack.npy"
    np.save(path, stack)
    crop = read_centre_of_file(path, 20, frames=2)
    np.testing.assert_array_equal(crop.frames, stack[:2, 15:35, 25:45])
    np.save(path, np.asfortranarray(stack[0]))
    np.testing.assert_array_equal(read_centre_of_file(path, 20).frames[0], stack[0, 15:35, 25:45])


def test_a_stack_whose_frames_exceed_the_limit_is_refused_on_opening(tmp_path, monkeypatch):
    # Stacks are read a whole frame at a time: a 2 x 60000 x 60000 .npy (a sparse hole on disk) must not get
    # as far as its first frame (6.7 GiB).
    from grainwright.inference.images.stacks import open_stack, read_stack

    bomb = sparse_npy_bomb(tmp_path / "volume.npy", shape=(2, 60000, 60000))
    with pytest.raises(InputError, match=r"volume.npy: declares 60000 x 60000 pixels, 1 channel, uint16"):
        open_stack(bomb)
    tiff = tmp_path / "volume.tif"
    tifffile.imwrite(tiff, np.zeros((3, 64, 64), np.uint16), compression="zlib", photometric="minisblack")
    assert open_stack(tiff).info.frames == 3
    monkeypatch.setenv(limits.PIXELS_VARIABLE, "4000")
    with pytest.raises(InputError, match=f"64 x 64 pixels.*{limits.PIXELS_VARIABLE}"):
        open_stack(tiff)
    monkeypatch.setenv(limits.PIXELS_VARIABLE, "5000")
    monkeypatch.setenv(limits.DECODED_VARIABLE, "1")
    tifffile.imwrite(tiff, np.zeros((200, 64, 64), np.uint16), compression="zlib",
                    photometric="minisblack")  # 1.6 MiB in all
    assert open_stack(tiff).info.frames == 200  # frame by frame: within the limits
    with pytest.raises(InputError, match="200 frames of 64 x 64"):
        read_stack(tiff)  # whole: over them
