"""Detail-loss checks on a synthetic faint line and spot on a flat background, where the answer is known.

Outside references: SciPy's Gaussian filter as the heavy blur; the closed form of the contrast of a blurred
line (a 2-pixel line of contrast c under a Gaussian of width s keeps about c * erf(1 / (s * sqrt(2))) at its
centre); scikit-image's camera sample image (open data) for a natural image.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import ndimage
from skimage import data, util

from grainwright.inference.common.errors import InputError
from grainwright.inference.evaluation.detail import (
    STRUCTURED_THRESHOLD,
    Region,
    added_structure,
    contrast_retention,
    contrast_standard_error,
    contrast_to_noise,
    find_regions,
    load_regions,
    most_detailed_box,
    removed_structure,
    structured_residual_map,
)

SIGMA = 0.05
LINE = Region("line", feature=(63, 40, 2, 50), background=(55, 40, 4, 50))  # [x, y, w, h]
SPOT = Region("spot", feature=(28, 98, 5, 5), background=(36, 98, 5, 5))


@pytest.fixture(scope="module")
def scene():
    """Flat 0.3 background, a faint vertical line (+0.12, 2 px wide) and a spot (+0.15, radius 2), noise 0.05."""
    clean = np.full((128, 128), 0.3)
    clean[40:90, 63:65] += 0.12
    rows, cols = np.mgrid[:128, :128]
    clean[(rows - 100) ** 2 + (cols - 30) ** 2 <= 4] += 0.15
    noisy = clean + SIGMA * np.random.default_rng(0).standard_normal(clean.shape)
    return clean, noisy


def test_identity_keeps_contrast_exactly(scene):
    _, noisy = scene
    for region in (LINE, SPOT):
        assert contrast_retention(noisy, noisy, region) == pytest.approx(1.0, abs=1e-12)


def test_heavy_blur_loses_contrast_and_cnr_does_not_show_it(scene):
    _, noisy = scene
    blurred = ndimage.gaussian_filter(noisy, 3.0)
    retention = contrast_retention(noisy, blurred, LINE)
    # A 2-px line under a 3-px Gaussian keeps erf(1 / (3 sqrt 2)) ~ 0.26 of its contrast at its centre.
    assert retention < 0.5
    assert retention == pytest.approx(math.erf(1 / (3 * math.sqrt(2))), abs=0.1)
    assert contrast_retention(noisy, blurred, SPOT) < 0.5
    # Contrast-to-noise rises all the same, because the noise dropped: why it is never reported alone.
    assert contrast_to_noise(blurred, LINE) > contrast_to_noise(noisy, LINE)


def test_the_clean_image_keeps_contrast_within_noise(scene):
    # The clean image's contrast over the noisy one's is 1 up to the noisy contrast's standard error.
    clean, noisy = scene
    for region in (LINE, SPOT):
        fx, fy, fw, fh = region.feature
        bx, by, bw, bh = region.background
        true_contrast = clean[fy : fy + fh, fx : fx + fw].mean() - clean[by : by + bh, bx : bx + bw].mean()
        spread = contrast_standard_error(region, SIGMA) / true_contrast
        assert abs(contrast_retention(noisy, clean, region) - 1.0) < 4 * spread


def test_structured_residual_map_lights_up_at_the_line_for_the_blur_only(scene):
    clean, noisy = scene
    blurred = removed_structure(noisy, ndimage.gaussian_filter(noisy, 3.0), SIGMA)
    oracle = removed_structure(noisy, clean, SIGMA)  # removes exactly the noise
    identity = removed_structure(noisy, noisy, SIGMA)
    line_zone = (slice(45, 85), slice(62, 66))
    flat_zone = (slice(0, 30), slice(90, 128))
    assert blurred["map"][line_zone].mean() > STRUCTURED_THRESHOLD
    assert abs(blurred["map"][flat_zone].mean()) < 0.1
    assert abs(oracle["map"][line_zone].mean()) < 0.15
    assert np.all(identity["map"] == 0)
    assert blurred["structured_fraction"] > 5 * max(oracle["structured_fraction"], 1e-3)


def test_removed_structure_ranks_blur_widths_on_a_natural_image():
    clean = util.img_as_float(data.camera())[100:228, 100:228]
    sigma = 20 / 255
    noisy = clean + sigma * np.random.default_rng(1).standard_normal(clean.shape)
    fractions = [removed_structure(noisy, ndimage.gaussian_filter(noisy, s), sigma)["structured_fraction"]
                 for s in (1, 3)]
    assert fractions[1] > fractions[0]
    # A method that takes off a twentieth of the heavy blur's residual follows the image just as well, but
    # removes next to nothing: it does not count.
    slight = noisy - 0.05 * (noisy - ndimage.gaussian_filter(noisy, 3))
    assert removed_structure(noisy, slight, sigma)["structured_fraction"] == 0.0
    assert structured_residual_map(noisy, noisy).shape == clean.shape


def test_find_regions_finds_the_line_and_the_spot(scene):
    _, noisy = scene
    regions = find_regions(noisy, SIGMA)
    assert 1 <= len(regions) <= 4

    def covers(region, x, y):
        fx, fy, fw, fh = region.feature
        return fx <= x < fx + fw and fy <= y < fy + fh

    assert any(covers(r, 63, y) or covers(r, 64, y) for r in regions for y in range(40, 90))
    assert any(covers(r, 30, 100) for r in regions)
    for region in regions:
        # Backgrounds sit beside the feature on flat ground: well away from the line and the spot.
        bx, by, bw, bh = region.background
        patch = noisy[by : by + bh, bx : bx + bw]
        assert abs(patch.mean() - 0.3) < 4 * SIGMA / math.sqrt(patch.size) + 0.01
    # Nothing found on pure noise.
    flat = 0.3 + SIGMA * np.random.default_rng(2).standard_normal((128, 128))
    assert find_regions(flat, SIGMA) == []


def test_added_structure_flags_a_new_square_only(scene):
    clean, noisy = scene
    assert not added_structure(noisy, noisy, SIGMA)["flag"]
    assert not added_structure(noisy, clean, SIGMA)["flag"]
    assert not added_structure(noisy, ndimage.gaussian_filter(noisy, 2.0), SIGMA)["flag"]
    invented = clean.copy()
    invented[10:20, 100:110] += 0.2  # a square the input never had
    result = added_structure(noisy, invented, SIGMA)
    assert result["flag"]
    assert result["map"][8:22, 98:112].sum() == result["added_pixels"]


def test_most_detailed_box_is_on_the_structure():
    image = np.zeros((100, 120))
    image[60:70, 80:90] = 1.0
    x, y, w, h = most_detailed_box(image, 32)
    assert (w, h) == (32, 32)
    assert x <= 80 and x + w >= 90 and y <= 60 and y + h >= 70
    assert most_detailed_box(image[:20, :20], 32) == (0, 0, 20, 20)


def test_load_regions_file_and_errors(tmp_path):
    path = tmp_path / "rois.json"
    path.write_text(json.dumps({"a.png": {"crack": {"feature": [1, 2, 3, 4], "background": [5, 6, 3, 4]}}}))
    assert load_regions(path) == {"a.png": [Region("crack", (1, 2, 3, 4), (5, 6, 3, 4))]}
    path.write_text(json.dumps({"a.png": {"crack": {"feature": [1, 2, 3]}}}))
    with pytest.raises(InputError, match="rois.json"):
        load_regions(path)
    path.write_text("{not json")
    with pytest.raises(InputError, match="rois.json"):
        load_regions(path)
    with pytest.raises(InputError, match="not found"):
        load_regions(tmp_path / "missing.json")
