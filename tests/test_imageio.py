"""Image I/O: exact round trips, effective bit depth, and one clear error per kind of bad input."""
from __future__ import annotations

import numpy as np
import pytest

from grainwright.inference.common.errors import InputError
from grainwright.inference.images.imageio import (
    effective_bit_depth,
    find_images,
    read_frames,
    read_image,
    read_text,
    write_image,
)

RNG = np.random.default_rng(7)


def _random(dtype: str, channels: int, shape=(9, 13)) -> np.ndarray:
    if np.dtype(dtype).kind == "f":
        return RNG.random((*shape, channels)).astype(dtype)
    info = np.iinfo(dtype)
    return RNG.integers(info.min, int(info.max) + 1, size=(*shape, channels)).astype(dtype)


@pytest.mark.parametrize("dtype", ["uint8", "uint16", "int8", "int16", "float32"])
@pytest.mark.parametrize("channels", [1, 2, 3, 4])
@pytest.mark.parametrize("suffix", [".tif", ".npy"])
def test_tiff_and_npy_round_trip_every_dtype_and_channel_count(tmp_path, dtype, channels, suffix):
    image = _random(dtype, channels)
    path = write_image(tmp_path / f"image{suffix}", image, text="grainwright test")
    back = read_image(path)
    assert back.dtype == image.dtype and back.shape == image.shape
    np.testing.assert_array_equal(back, image)
    assert read_text(path) == "grainwright test"


@pytest.mark.parametrize("dtype", ["uint8", "uint16"])
@pytest.mark.parametrize("channels", [1, 2, 3, 4])
def test_png_round_trip(tmp_path, dtype, channels):
    image = _random(dtype, channels)
    path = write_image(tmp_path / "image.png", image, text="note")
    np.testing.assert_array_equal(read_image(path), image)
    assert read_image(path).dtype == image.dtype
    assert read_text(path) == "note"


def test_16_bit_colour_png_is_a_valid_png_and_scanline_filters_match_libpng(tmp_path):
    import zlib

    from PIL import Image
    from skimage import data

    from grainwright.inference.images import imageio

    # Our 16-bit colour file is a valid PNG: Pillow (libpng-compatible) opens it, reduced to its high bytes.
    image = _random("uint16", 3, shape=(21, 34))
    path = write_image(tmp_path / "colour16.png", image)
    with Image.open(path) as opened:
        np.testing.assert_array_equal(np.asarray(opened.convert("RGB")), (image >> 8).astype(np.uint8))
    # The reader's scanline unfiltering (all five PNG filter types) against Pillow's decoder, on an 8-bit file
    # Pillow wrote with adaptive filtering (open data: scikit-image's astronaut).
    crop = data.astronaut()[:64, :80]
    Image.fromarray(crop).save(tmp_path / "filtered.png", optimize=True)
    chunks = list(imageio._png_chunks(tmp_path / "filtered.png", (tmp_path / "filtered.png").read_bytes()))
    lines = np.frombuffer(zlib.decompress(b"".join(d for k, d in chunks if k == b"IDAT")), np.uint8)
    lines = lines.reshape(64, 80 * 3 + 1)
    assert len(np.unique(lines[:, 0])) >= 3  # several filter types really occur
    decoded = imageio._png_unfilter(tmp_path / "filtered.png", lines[:, 0], lines[:, 1:], 80, 3)
    np.testing.assert_array_equal(decoded.reshape(64, 80, 3), crop)


def test_png_refuses_what_it_cannot_hold(tmp_path):
    with pytest.raises(InputError, match="TIFF"):
        write_image(tmp_path / "float.png", _random("float32", 1))


def test_multi_page_tiff_is_a_stack_of_frames(tmp_path):
    stack = _random("uint16", 1, shape=(4, 8, 6)).reshape(4, 8, 6, 1)
    path = write_image(tmp_path / "stack.tif", stack)
    frames = read_frames(path)
    assert frames.shape == (4, 8, 6, 1)
    np.testing.assert_array_equal(frames, stack)
    with pytest.raises(InputError, match="4 frames"):
        read_image(path)


def test_tiff_pages_of_different_shapes_are_refused(tmp_path):
    import tifffile

    path = tmp_path / "mixed.tif"
    with tifffile.TiffWriter(path) as tiff:
        tiff.write(np.zeros((8, 8), np.uint8), metadata=None)
        tiff.write(np.zeros((6, 8), np.uint8), metadata=None)
    with pytest.raises(InputError, match="different shapes") as error:
        read_frames(path)
    assert "mixed.tif" in str(error.value)


def test_writing_clips_and_rounds_never_wraps(tmp_path):
    values = np.array([[-20.0, 0.4, 0.6, 254.5, 300.0]], dtype=np.float32)
    path = write_image(tmp_path / "clipped.tif", values, dtype="uint8")
    np.testing.assert_array_equal(read_image(path)[0, :, 0], [0, 0, 1, 254, 255])  # rint: 254.5 -> 254 (even)
    wide = np.array([[70000, -5, 1000]], dtype=np.int64)
    path = write_image(tmp_path / "wide.tif", wide, dtype="uint16")
    np.testing.assert_array_equal(read_image(path)[0, :, 0], [65535, 0, 1000])


def test_write_is_atomic_and_does_not_overwrite(tmp_path):
    path = write_image(tmp_path / "once.tif", _random("uint8", 1))
    with pytest.raises(InputError, match="already exists"):
        write_image(path, _random("uint8", 1))
    write_image(path, np.zeros((3, 3), np.uint8), overwrite=True)
    assert read_image(path).shape == (3, 3, 1)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["once.tif"]  # no temporary files left behind


@pytest.mark.parametrize(
    "top,expected", [(255, 8), (256, 10), (1023, 10), (4095, 12), (4096, 14), (16383, 14), (40000, 16)]
)
def test_effective_bit_depth_of_16_bit_containers(top, expected):
    data = np.zeros((4, 4, 1), np.uint16)
    data[0, 0, 0] = top
    assert effective_bit_depth(data) == expected


def test_effective_bit_depth_other_dtypes():
    assert effective_bit_depth(np.zeros((2, 2, 1), np.uint8)) == 8
    assert effective_bit_depth(np.zeros((2, 2, 1), np.int16)) == 16
    assert effective_bit_depth(np.zeros((2, 2, 1), np.float32)) is None


def test_missing_empty_truncated_and_unsupported_files(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        read_image(tmp_path / "missing.png")
    (tmp_path / "empty.tif").write_bytes(b"")
    with pytest.raises(InputError, match="empty file"):
        read_image(tmp_path / "empty.tif")
    good = write_image(tmp_path / "good.png", _random("uint8", 3, shape=(64, 64)))
    (tmp_path / "truncated.png").write_bytes(good.read_bytes()[: good.stat().st_size // 2])
    with pytest.raises(InputError, match="truncated") as error:
        read_image(tmp_path / "truncated.png")
    assert "truncated.png" in str(error.value)
    good_tiff = write_image(tmp_path / "good.tif", _random("uint16", 1, shape=(64, 64)))
    (tmp_path / "cut.tif").write_bytes(good_tiff.read_bytes()[:100])
    with pytest.raises(InputError, match="cut.tif"):
        read_image(tmp_path / "cut.tif")
    (tmp_path / "notes.txt").write_text("hello")
    with pytest.raises(InputError, match="unsupported file type"):
        read_image(tmp_path / "notes.txt")


def test_bad_pixel_types_and_shapes(tmp_path):
    np.save(tmp_path / "complex.npy", np.zeros((4, 4), np.complex64))
    with pytest.raises(InputError, match="complex"):
        read_image(tmp_path / "complex.npy")
    np.save(tmp_path / "int32.npy", np.zeros((4, 4), np.int32))
    with pytest.raises(InputError, match="convert to uint16 or float32"):
        read_image(tmp_path / "int32.npy")
    np.save(tmp_path / "zero.npy", np.zeros((0, 4), np.uint8))
    with pytest.raises(InputError, match="zero-size"):
        read_image(tmp_path / "zero.npy")


def test_nonfinite_pixels_error_by_default_or_replaced_by_median(tmp_path):
    image = np.arange(16, dtype=np.float32).reshape(4, 4)
    image[1, 1] = np.nan
    image[2, 2] = np.inf
    np.save(tmp_path / "nan.npy", image)
    with pytest.raises(InputError, match="2 NaN/Inf"):
        read_image(tmp_path / "nan.npy")
    fixed = read_image(tmp_path / "nan.npy", nonfinite="replace")
    finite = image[np.isfinite(image)]
    assert np.isfinite(fixed).all()
    assert fixed[1, 1, 0] == fixed[2, 2, 0] == np.median(finite)


def test_find_images_files_folders_globs(tmp_path):
    for name in ("b.png", "a.tif", "c.npy", "notes.txt"):
        (tmp_path / name).write_bytes(b"x")
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "d.tiff").write_bytes(b"x")
    assert [p.name for p in find_images(tmp_path)] == ["a.tif", "b.png", "c.npy"]
    assert [p.name for p in find_images(tmp_path, recursive=True)] == ["a.tif", "b.png", "c.npy", "d.tiff"]
    assert [p.name for p in find_images(str(tmp_path / "*.png"))] == ["b.png"]
    assert find_images([tmp_path / "missing.png"]) == [tmp_path / "missing.png"]  # read reports it by name
    with pytest.raises(InputError, match="no file matches"):
        find_images(str(tmp_path / "*.jpg"))
