"""Data folder layouts, loading errors and vectorised patch sampling."""
from __future__ import annotations

import numpy as np
import pytest

from grainwright.inference.common.errors import InputError
from grainwright.inference.images.imageio import write_image
from grainwright.trainer.data import (
    PatchSource,
    detect_layout,
    read_layout,
    split_by_image,
    split_single_image,
)


def _image(seed: int, size: int = 40, channels: int = 1) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 256, (size, size, channels)).astype(np.uint8)


def _write(folder, name, array):
    folder.mkdir(parents=True, exist_ok=True)
    write_image(folder / name, array)


@pytest.mark.parametrize("folders, layout", [
    (("clean",), "clean-only"),
    (("clean", "noisy"), "clean-noisy"),
    (("noisy-a", "noisy-b"), "noisy-pairs"),
    (("noisy",), "noisy-only"),
])
def test_layouts_are_detected_and_paired_by_name(tmp_path, folders, layout):
    for folder in folders:
        for i in range(3):
            _write(tmp_path / folder, f"scene{i}.png", _image(i))
    found = detect_layout(tmp_path)
    assert found.name == layout
    assert len(found.samples) == 3
    for sample in found.samples:
        assert len({path.stem for path in sample}) == 1
        assert [path.parent.name for path in sample] == list(folders)


def test_loose_images_are_single_noisy_images(tmp_path):
    _write(tmp_path, "a.png", _image(0))
    assert detect_layout(tmp_path).name == "noisy-only"


def test_stacks_give_consecutive_frame_pairs(tmp_path):
    frames = np.stack([_image(i) for i in range(4)])
    (tmp_path / "noisy-stacks").mkdir()
    np.save(tmp_path / "noisy-stacks" / "scene.npy", frames)
    layout = detect_layout(tmp_path)
    assert layout.name == "noisy-stacks"
    images, _ = read_layout(layout, 16)
    assert len(images) == 3
    np.testing.assert_array_equal(images[1]["noisy"], frames[1])
    np.testing.assert_array_equal(images[1]["noisy_b"], frames[2])


def test_empty_folder_is_a_clear_error(tmp_path):
    with pytest.raises(InputError, match="no images found"):
        detect_layout(tmp_path)
    with pytest.raises(InputError, match="data folder not found"):
        detect_layout(tmp_path / "missing")


def test_missing_partner_is_named(tmp_path):
    _write(tmp_path / "clean", "a.png", _image(0))
    _write(tmp_path / "clean", "b.png", _image(1))
    _write(tmp_path / "noisy", "a.png", _image(2))
    with pytest.raises(InputError, match=r"b\.png: has no partner named 'b\.\*' in noisy/"):
        detect_layout(tmp_path)


def test_mismatched_pair_names_both_files(tmp_path):
    _write(tmp_path / "noisy-a", "a.png", _image(0, 40))
    _write(tmp_path / "noisy-b", "a.png", _image(1, 48))
    with pytest.raises(InputError, match=r"noisy-a/a\.png: does not match its partner .*noisy-b/a\.png"):
        read_layout(detect_layout(tmp_path), 16)
    (tmp_path / "noisy-b" / "a.png").unlink()
    write_image(tmp_path / "noisy-b" / "a.png", _image(1, 40).astype(np.uint16) * 256)
    with pytest.raises(InputError, match="uint8 vs .* uint16"):
        read_layout(detect_layout(tmp_path), 16)


def test_unreadable_images_are_skipped_unless_none_remain(tmp_path):
    _write(tmp_path / "noisy", "good.png", _image(0))
    (tmp_path / "noisy" / "broken.png").write_bytes(b"\x89PNG not really")
    with pytest.warns(UserWarning, match=r"skipped .*broken\.png"):
        images, sources = read_layout(detect_layout(tmp_path), 16)
    assert [path.name for path in sources] == ["good.png"]
    (tmp_path / "noisy" / "good.png").unlink()
    with pytest.warns(UserWarning), pytest.raises(InputError, match="none of the images could be read"):
        read_layout(detect_layout(tmp_path), 16)


def test_small_images_nan_and_channel_mismatch_are_errors(tmp_path):
    _write(tmp_path / "noisy", "small.png", _image(0, 20))
    with pytest.raises(InputError, match=r"small\.png: is 20x20 pixels, smaller than the patch size 32"):
        read_layout(detect_layout(tmp_path), 32)
    (tmp_path / "noisy" / "small.png").unlink()
    _write(tmp_path / "noisy", "gray.png", _image(0, 40, 1))
    _write(tmp_path / "noisy", "rgb.png", _image(1, 40, 3))
    with pytest.raises(InputError, match="channels"):
        read_layout(detect_layout(tmp_path), 16)
    for path in (tmp_path / "noisy").iterdir():
        path.unlink()
    data = np.random.default_rng(0).random((40, 40), dtype=np.float32)
    data[3, 4] = np.nan
    np.save(tmp_path / "noisy" / "nan.npy", data)
    with pytest.raises(InputError, match=r"nan\.npy: .*NaN"):
        read_layout(detect_layout(tmp_path), 16)


def _position_image(height: int, width: int, channels: int = 1) -> np.ndarray:
    """Pixel value = its flat position (times 10 plus the channel), so a patch tells where it came from."""
    base = np.arange(height * width, dtype=np.float32).reshape(height, width, 1) * 10
    return base + np.arange(channels, dtype=np.float32)


def test_patches_are_slices_of_the_images():
    images = [_position_image(30, 50, 2), _position_image(41, 33, 2)]
    source = PatchSource({"noisy": images})
    patches = source.sample(np.random.default_rng(0), 64, 12, augment=False)["noisy"]
    assert patches.shape == (64, 2, 12, 12)
    seen = set()
    for patch in patches:
        corner = int(patch[0, 0, 0]) // 10
        for index, image in enumerate(images):
            width = image.shape[1]
            top, left = divmod(corner, width)
            if top + 12 <= image.shape[0] and left + 12 <= width:
                expected = image[top:top + 12, left:left + 12].transpose(2, 0, 1)
                if np.array_equal(patch, expected):
                    seen.add(index)
                    break
        else:
            pytest.fail("a patch is not a slice of any image")
    assert seen == {0, 1}


def test_focus_frames_get_their_share_of_the_patches_whatever_their_number():
    """Three frames marked as focus among nine, share 0.6: 60 % of the draws come from them (each group in
    proportion to its patch positions); without marks, draws follow the positions alone. Checked by counting the
    draws of 20,000 patches against the binomial spread (3 standard errors, about 0.01)."""
    images = [np.full((40 + 4 * i, 40, 1), float(i), np.float32) for i in range(9)]
    focus = [i in (2, 5, 7) for i in range(9)]
    source = PatchSource({"noisy": images}, focus, 0.6)
    weights = source.image_weights(8)
    positions = np.array([(40 + 4 * i - 7) * 33 for i in range(9)], float)
    assert weights[focus].sum() == pytest.approx(0.6)
    assert weights[focus] / weights[focus].sum() == pytest.approx(positions[focus] / positions[focus].sum())
    drawn = source.sample(np.random.default_rng(0), 20000, 8, augment=False)["noisy"][:, 0, 0, 0].astype(int)
    assert abs(np.isin(drawn, [2, 5, 7]).mean() - 0.6) < 3 * np.sqrt(0.6 * 0.4 / 20000)
    plain = PatchSource({"noisy": images}).image_weights(8)
    assert plain == pytest.approx(positions / positions.sum())
    assert PatchSource({"noisy": images}, [True] * 9, 0.6).image_weights(8) == pytest.approx(plain)


def test_augmented_patches_are_flips_and_rotations_of_slices():
    # Reference: numpy's rot90 and flips generate the 8 symmetries of the square (the dihedral group D4).
    image = _position_image(40, 40)
    source = PatchSource({"clean": [image], "noisy": [image + 0.5]})
    batch = source.sample(np.random.default_rng(1), 200, 8, augment=True)
    found = set()
    for clean, noisy in zip(batch["clean"][:, 0], batch["noisy"][:, 0]):
        np.testing.assert_array_equal(noisy, clean + 0.5)  # roles stay aligned
        top, left = divmod(int(clean.min()) // 10, 40)
        window = image[top:top + 8, left:left + 8, 0]
        variants = [np.rot90(window, k) for k in range(4)] + [np.rot90(window.T, k) for k in range(4)]
        matches = [k for k, variant in enumerate(variants) if np.array_equal(clean, variant)]
        assert matches, "an augmented patch is not a symmetry of a slice"
        found.add(matches[0])
    assert found == set(range(8))


def test_flat_patches_are_skipped():
    rng = np.random.default_rng(2)
    image = np.zeros((64, 128, 1), dtype=np.float32)
    image[:, 64:] = rng.random((64, 64, 1))
    source = PatchSource({"noisy": [image]})
    plain = source.sample(np.random.default_rng(3), 200, 16, augment=False)["noisy"]
    assert (plain.reshape(200, -1).std(axis=1) < 1e-3).sum() > 20
    skipped = source.sample(np.random.default_rng(3), 200, 16, augment=False, flat_level=0.01)["noisy"]
    assert (skipped.reshape(200, -1).std(axis=1) < 1e-3).sum() == 0


def test_sampling_is_seeded():
    source = PatchSource({"noisy": [_position_image(30, 30)]})
    first = source.sample(np.random.default_rng(5), 8, 8)["noisy"]
    again = source.sample(np.random.default_rng(5), 8, 8)["noisy"]
    np.testing.assert_array_equal(first, again)


def test_validation_split_is_by_whole_image():
    train, held = split_by_image(10, 0.2, np.random.default_rng(0))
    assert len(held) == 2 and len(train) == 8
    assert sorted(set(train) | set(held)) == list(range(10))
    assert split_by_image(1, 0.2, np.random.default_rng(0))[1].size == 0
    image = {"noisy": np.zeros((100, 60, 1), np.float32)}
    part, rest = split_single_image(image, 0.2, 16)
    assert part["noisy"].shape == (80, 60, 1) and rest["noisy"].shape == (20, 60, 1)
    assert split_single_image(image, 0.2, 90)[1] is None


def test_region_split_of_a_stack_window_cuts_rows_or_columns_never_frames():
    window = {"noisy": np.arange(5 * 100 * 60, dtype=np.float32).reshape(5, 100, 60, 1)}
    part, rest = split_single_image(window, 0.2, 16)
    assert part["noisy"].shape == (5, 80, 60, 1) and rest["noisy"].shape == (5, 20, 60, 1)
    np.testing.assert_array_equal(np.concatenate([part["noisy"], rest["noisy"]], axis=1), window["noisy"])
    wide = {"noisy": np.zeros((5, 60, 100, 1), np.float32)}
    part, rest = split_single_image(wide, 0.2, 16)
    assert part["noisy"].shape == (5, 60, 80, 1) and rest["noisy"].shape == (5, 60, 20, 1)
