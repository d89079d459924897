"""The generated demo stacks: a conveyor sequence with stated motion and a cast volume with internal pores, both
with exact clean frames; and the benchmark's scoring helpers."""
from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile

from grainwright.benchmarks.stacks import psnr
from grainwright.inference.evaluation.stack_compare import frame_average
from grainwright.inference.synthetic.stack_scenario import (
    METAL_LEVEL,
    PORE_LEVEL,
    cast_volume,
    conveyor_sequence,
    write_stack_scenario,
)


def test_sequence_motion_is_as_stated():
    sequence = conveyor_sequence(frames=6, height=64, width=96, speed=3, seed=1)
    top, bottom = sequence.motion["lane_rows"]
    assert sequence.motion["speed_pixels_per_frame"] == 3
    assert sequence.motion["moving_share"] == sequence.moving.mean() > 0.2
    assert not sequence.moving[:top].any() and not sequence.moving[bottom:].any()
    # Outside the lane the clean frames are identical; inside, frame t + 1 is frame t shifted 3 pixels right.
    assert np.array_equal(sequence.clean[0, :top], sequence.clean[5, :top])
    assert np.array_equal(sequence.clean[1, top:bottom, 3:], sequence.clean[0, top:bottom, :-3])
    assert sequence.noisy.dtype == np.uint16 and sequence.noisy.shape == (6, 64, 96)


def test_volume_pores_sit_inside_the_metal():
    volume = cast_volume(slices=24, size=48, pores=6, seed=2)
    assert len(volume.pores) == 6
    for z, y, x, _ in volume.pores:  # darker than the metal at its centre, however small (partial volume)
        assert PORE_LEVEL - 50 < volume.clean[z, y, x] < METAL_LEVEL - 0.3 * (METAL_LEVEL - PORE_LEVEL)
    residual = volume.noisy.astype(np.float64) - volume.clean
    assert 0.8 * 180 < residual.std() < 1.2 * 180
    # The stated slice-to-slice correlation of the noise (AR(1) along Z).
    correlation = np.corrcoef(residual[1:].ravel(), residual[:-1].ravel())[0, 1]
    assert abs(correlation - volume.noise["slice_correlation"]) < 0.05


def test_scenario_files_carry_axes_and_clean_frames(tmp_path):
    description = write_stack_scenario(tmp_path, seed=3, sequence_frames=8, volume_slices=12, small=True)
    with tifffile.TiffFile(tmp_path / "noisy-stacks" / "casting.tif") as tiff:
        assert tiff.series[0].axes == "ZYX" and tiff.imagej_metadata["spacing"] == 0.1
    with tifffile.TiffFile(tmp_path / "noisy-stacks" / "conveyor.tif") as tiff:
        assert tiff.series[0].axes == "TYX" and tiff.series[0].shape[0] == 8
    assert tifffile.imread(tmp_path / "clean-stacks" / "conveyor.tif").dtype == np.float32
    saved = json.loads((tmp_path / "stacks.json").read_text())
    assert saved["conveyor"]["motion"] == description["conveyor"]["motion"]


def test_frame_average_and_psnr():
    # Reference values: PSNR = 10 log10(peak^2 / MSE) (Gonzalez and Woods); a still scene averaged over 5 frames.
    clean = np.full((7, 4, 4), 1000.0)
    assert psnr(clean, clean + 10.0) == 10 * np.log10(4095.0**2 / 100.0)
    noisy = (clean + np.arange(7)[:, None, None])[..., None]
    assert frame_average(noisy, 5)[0, 0, 0, 0] == 1000.0 + (2 + 1 + 0 + 1 + 2) / 5


def test_sequence_cracks_ride_the_lane_with_their_boxes():
    """Every crack's boxes sit where its clean contrast is: the same dark contrast in every frame listed, the
    lane's cracks moving ``speed`` pixels per frame."""
    sequence = conveyor_sequence(frames=8, height=128, width=160, speed=3, seed=0)
    assert any(crack["moving"] for crack in sequence.cracks)
    contrasts, columns = {}, {}
    for crack in sequence.cracks:
        frame = sequence.clean[crack["frame"]]
        (x, y, w, h), (bx, by, bw, bh) = crack["feature"], crack["background"]
        contrasts.setdefault(crack["name"], []).append(frame[y:y + h, x:x + w].mean() -
                                                       frame[by:by + bh, bx:bx + bw].mean())
        columns.setdefault(crack["name"], []).append((crack["frame"], x))
    for name, values in contrasts.items():
        assert max(values) < 0 and np.ptp(values) < 1e-6 * abs(np.mean(values)), name
        steps = {(x1 - x0) / (f1 - f0) for (f0, x0), (f1, x1) in zip(columns[name], columns[name][1:])}
        assert steps == ({3.0} if name.startswith("lane") else {0.0}) or len(values) == 1, name


def test_crack_retention_is_one_for_the_clean_frames_and_drops_when_blurred():
    from scipy import ndimage

    from grainwright.benchmarks.stacks import crack_retention

    sequence = conveyor_sequence(frames=6, height=128, width=160, seed=0)
    kept = crack_retention(sequence, sequence.clean)
    blurred = crack_retention(sequence, ndimage.uniform_filter(sequence.clean, (1, 7, 7)))
    for label in ("moving", "still"):
        if kept[f"cracks_{label}"]:
            assert kept[f"crack_retention_{label}"] == 1.0
            assert blurred[f"crack_retention_{label}"] < 0.8  # a 7 x 7 box filter wipes out a 1-pixel line


@pytest.mark.parametrize("family", ["recorrupted", "neighbor2neighbor"])
def test_bench_sequence_quality_computes_every_row(tmp_path, family):
    from grainwright.benchmarks.stacks import SEQUENCE_SCHEMES, sequence_quality

    # Frames this small do not hold enough flat area for a confident Poisson-Gaussian fit: describe the sensor.
    noise = tmp_path / "noise.toml"
    noise.write_text(f'kind = "poisson-gaussian"\ngain = {8.0 / 4095}\nread = {14.0 / 4095}\n')
    figures = sequence_quality(tmp_path, frames=3, minutes=1.0, seed=0, threads=1, width=4, bm3d_frames_scored=0,
                               log=lambda message: None, steps=2, shape=(64, 96), family=family,
                               settings=(f'noise.file="{noise}"',))
    assert figures["trained"]["unet-stack"]["steps"] == 2 and figures["trained"]["unet-stack"]["stack_axis"] == "T"
    assert figures["trained"]["unet-stack"]["align_neighbours"] == ("dominant-shifts" if family == "recorrupted"
                                                                     else "none")
    assert [figures["trained"][name]["scheme"] for name in ("unet-stack", "unet-small")] == list(
        SEQUENCE_SCHEMES[family])
    assert set(figures["rows"]) == {"noisy", "3-frame average", "unet-stack K=3", "unet-small (single frame)"}
    for row in figures["rows"].values():
        assert np.isfinite(row["psnr_whole"]) and "crack_retention_moving" in row


def test_bench_runtime_times_the_aligned_models_beside_the_plain_one(tmp_path):
    """The runtime part times the K-frame model with neighbours aligned by each alignment beside the same model
    without, on a stack whose middle band moves (so that both alignments do their work): the motion estimates
    and warps make it slower (random weights; speed does not depend on them)."""
    from grainwright.benchmarks.stacks import export_random, moving_band_stack, runtime_figures
    from grainwright.inference.images.alignment import AlignedNeighbours
    from grainwright.inference.runtime.modelinfo import read_model_metadata

    levels = {"levels": 2, "width": 4}
    stack = export_random("unet-stack", {"frames": 3, **levels}, tmp_path / "stack.onnx")
    aligned = {alignment: export_random("unet-stack", {"frames": 3, **levels}, tmp_path / f"{alignment}.onnx",
                                        align=alignment) for alignment in ("optical-flow", "dominant-shifts")}
    single = export_random("unet-small", levels, tmp_path / "single.onnx")
    assert read_model_metadata(aligned["dominant-shifts"])["stack"]["align_neighbours"] == "dominant-shifts"
    figures = runtime_figures(stack, single, size=64, frames=4, threads=1, repeats=1, aligned_models=aligned)
    assert set(figures["seconds_per_megapixel_per_frame"]) == {"stack", "single", "stack optical-flow",
                                                               "stack dominant-shifts"}
    assert figures["aligned_ratio"]["optical-flow"] > 1.0, figures
    assert set(figures["aligned_over_single"]) == {"optical-flow", "dominant-shifts"}
    band = moving_band_stack(4, 64)
    steps = AlignedNeighbours(band, alignment="dominant-shifts").step(1, 2).as_flow()
    assert np.all(steps[:, 64 // 3 + 8:2 * 64 // 3 - 8, 8:-8] == np.array([0, 3])[:, None, None])
