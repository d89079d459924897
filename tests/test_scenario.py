"""The demo scenario: seeded frames, 12-bit range, details that exist, noise that follows the sensor model."""
from __future__ import annotations

import json

import numpy as np
import pytest

from grainwright.inference.synthetic.scenario import (
    FULL_SCALE,
    SensorModel,
    generate_frame,
    render_clean,
    write_scenario,
)


def _box(image: np.ndarray, box: list[int]) -> np.ndarray:
    x, y, w, h = box
    return image[y : y + h, x : x + w]


def test_same_seed_same_frame_other_seed_other_frame():
    a, b = generate_frame(96, 128, 11), generate_frame(96, 128, 11)
    assert np.array_equal(a.clean, b.clean) and np.array_equal(a.noisy, b.noisy)
    assert a.serial == b.serial and a.rois() == b.rois()
    c = generate_frame(96, 128, 12)
    assert not np.array_equal(a.clean, c.clean)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_frames_are_12_bit_in_16_bit(seed):
    frame = generate_frame(128, 128, seed)
    for image in (frame.clean, frame.noisy):
        assert image.dtype == np.uint16 and image.shape == (128, 128, 1)
        assert int(image.max()) <= FULL_SCALE
    # The machined face is bright enough that the data use the twelfth bit, so bit-depth detection sees 12 bits.
    assert int(frame.noisy.max()) > 2047


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4])
def test_every_roi_lies_inside_the_frame_and_pairs_do_not_overlap(seed):
    frame = generate_frame(128, 160, seed)
    kinds = {d.kind for d in frame.details}
    assert kinds == {"crack", "pore"}
    for detail in frame.details:
        for x, y, w, h in (detail.feature, detail.background):
            assert w >= 1 and h >= 1 and x >= 0 and y >= 0 and x + w <= 160 and y + h <= 128
        fx, fy, fw, fh = detail.feature
        bx, by, bw, bh = detail.background
        assert (fw, fh) == (bw, bh)
        assert fx + fw <= bx or bx + bw <= fx or fy + fh <= by or by + bh <= fy


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4, 5])
def test_cracks_and_pores_are_darker_than_their_background_in_the_clean_frame(seed):
    clean, details, _ = render_clean(128, 128, seed)
    assert details
    for detail in details:
        contrast = _box(clean, detail.background).mean() - _box(clean, detail.feature).mean()
        # A real, visible detail: at least a tenth of its rendered depth survives box averaging, and at least the
        # read-noise level of a single pixel (the cracks are about one pixel wide, the boxes a few).
        assert contrast > max(0.1 * detail.depth, SensorModel().read), (detail, contrast)


def test_details_are_detectable_through_the_noise():
    # Averaged over many details, the noisy frame shows the same contrast as the clean one (zero-mean noise),
    # which is what contrast retention measured on noisy input relies on.
    clean_c, noisy_c = [], []
    for seed in range(6):
        frame = generate_frame(160, 160, seed)
        for d in frame.details:
            for store, image in ((clean_c, frame.clean[..., 0]), (noisy_c, frame.noisy[..., 0])):
                store.append(_box(image, d.background).astype(float).mean() - _box(image, d.feature).mean())
    clean_c, noisy_c = np.array(clean_c), np.array(noisy_c)
    assert noisy_c.mean() == pytest.approx(clean_c.mean(), rel=0.15)


def test_pixel_variance_follows_the_poisson_gaussian_model():
    # Variance = gain * mean + read^2 (Foi et al. 2008, eq. 1-3); the fitted line recovers the model's parameters.
    sensor = SensorModel(gain=8.0, read=14.0, row_banding=0.0)
    rng = np.random.default_rng(0)
    levels = np.array([50.0, 200.0, 600.0, 1200.0, 2500.0])
    variances = []
    for level in levels:
        clean = np.full((256, 256), level)
        noisy = sensor.sample(clean, rng)
        assert noisy.mean() == pytest.approx(level, abs=4 * np.sqrt(sensor.variance(level) / clean.size))
        variances.append(noisy.var())
    slope, intercept = np.polyfit(levels, variances, 1)
    assert slope == pytest.approx(8.0, rel=0.05)
    assert np.sqrt(intercept) == pytest.approx(14.0, rel=0.15)
    assert np.allclose(variances, sensor.variance(levels), rtol=0.05)


def test_row_banding_adds_a_shared_offset_per_row():
    sensor = SensorModel(gain=8.0, read=14.0, row_banding=5.0)
    clean = np.full((2048, 256), 800.0)
    residual = sensor.sample(clean, np.random.default_rng(1)) - clean
    row_means = residual.mean(axis=1)
    # Var(row mean) = banding^2 + pixel variance / width; within rows the offset cancels in the row-centred residual.
    expected = sensor.row_banding**2 + sensor.variance(800.0) / 256
    assert row_means.var() == pytest.approx(expected, rel=0.12)
    within = residual - row_means[:, None]
    assert within.var() == pytest.approx(sensor.variance(800.0), rel=0.03)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_single_frame_poisson_gaussian_fit_recovers_the_sensor(seed):
    # The foundation's single-image fit (after Foi et al. 2008) on a whole scenario frame, textures and edges
    # included, after the row-banding correction (as the demo does), recovers the sensor: gain within 15%, read
    # noise within 15% or 0.2% of the range, whichever is larger (the tolerances the fit was specified with).
    from grainwright.inference.noise.estimation import (
        correct_fixed_pattern,
        fit_poisson_gaussian,
    )

    sensor = SensorModel()
    fit = fit_poisson_gaussian(correct_fixed_pattern(generate_frame(384, 384, seed, sensor).noisy))
    assert fit.gain == pytest.approx(sensor.gain, rel=0.15)
    assert fit.read == pytest.approx(sensor.read, abs=max(0.15 * sensor.read, 0.002 * FULL_SCALE))
    assert fit.signal_dependent


def test_frames_report_12_bit_depth():
    from grainwright.inference.images.imageio import effective_bit_depth

    assert effective_bit_depth(generate_frame(128, 128, 9).noisy) == 12


def test_noise_description_is_in_working_units():
    description = SensorModel(gain=8.0, read=14.0).to_noise_description()
    assert description["kind"] == "poisson-gaussian"
    # Working units: the native range maps onto [0, 1]; variance gain*x scales by one power of the full scale.
    assert description["gain"] == pytest.approx(8.0 / FULL_SCALE)
    assert description["read"] == pytest.approx(14.0 / FULL_SCALE)


def test_write_scenario_layout_and_rois(tmp_path):
    import tifffile

    manifest = write_scenario(tmp_path, n_train=2, n_holdout=2, size=96, seed=3, large_size=(96, 160))
    train = sorted(p.name for p in (tmp_path / "train").iterdir())
    assert train == ["frame-000.tif", "frame-001.tif"]
    assert sorted(p.name for p in (tmp_path / "train-clean").iterdir()) == train
    rois = json.loads((tmp_path / "rois.json").read_text())
    assert sorted(rois) == sorted(p.name for p in (tmp_path / "holdout" / "noisy").iterdir())
    assert sorted(rois) == sorted(p.name for p in (tmp_path / "holdout" / "clean").iterdir())
    large = tifffile.imread(tmp_path / "large" / "noisy" / "large-000.tif")
    assert large.shape == (96, 160) and large.dtype == np.uint16
    assert json.loads((tmp_path / "large-rois.json").read_text())["large-000.tif"]
    assert manifest["noise"]["kind"] == "poisson-gaussian"
    # Frame i of a set depends on the seed only, not on how many frames were asked for.
    again = tmp_path / "again"
    write_scenario(again, n_train=1, n_holdout=1, size=96, seed=3, large_size=None)
    first = tifffile.imread(tmp_path / "train" / "frame-000.tif")
    assert np.array_equal(first, tifffile.imread(again / "train" / "frame-000.tif"))
    assert not [p for p in tmp_path.rglob(".*")]  # no temporary files left behind


def test_rois_file_reads_as_compare_regions(tmp_path):
    # The compare command's reader (grainwright.inference.evaluation.detail.load_regions) accepts the scenario's ROI files.
    from grainwright.inference.evaluation.detail import load_regions

    write_scenario(tmp_path, n_train=0, n_holdout=2, size=128, seed=5, large_size=None)
    regions = load_regions(tmp_path / "rois.json")
    assert sorted(regions) == ["holdout-000.tif", "holdout-001.tif"]
    assert all(regions[name] for name in regions)
    assert {r.name.split("-")[0] for r in regions["holdout-000.tif"]} <= {"crack", "pore"}


def test_banding_is_flagged_and_the_correction_clears_it():
    # The foundation's banding flag (robust row offsets of a high-pass residual) sees the scenario's faint row
    # banding on most 256-pixel frames, and the fixed-pattern correction removes it.
    from grainwright.inference.noise.estimation import (
        analyse_noise,
        correct_fixed_pattern,
    )

    before = after = 0
    for seed in range(4):
        noisy = generate_frame(256, 256, seed).noisy
        before += analyse_noise(noisy, 0, FULL_SCALE).banding.flagged
        after += analyse_noise(correct_fixed_pattern(noisy), 0, FULL_SCALE).banding.flagged
    assert before >= 3 and after == 0
