"""Seamless tiling: the tiled result equals the whole-image result, borders included."""
from __future__ import annotations

import functools
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_runner import NATIVE_HIGH, build_conv_model

from grainwright.inference.runtime.runner import OnnxDenoiser
from grainwright.inference.runtime.tiling import (
    MAX_OVERLAP_COST,
    default_tile,
    overlap_cost,
    pad_to_alignment,
    plan_tiles,
    reflect_indices,
    tile_margin,
)

_MODEL_DIR = Path(tempfile.mkdtemp(prefix="grainwright-tiling-"))


@functools.cache
def _graph_denoiser(channels: int, pooled: bool, noise_map: bool, per_pixel: bool = False) -> OnnxDenoiser:
    name = f"c{channels}-p{int(pooled)}-m{int(noise_map)}-{int(per_pixel)}.onnx"
    path = build_conv_model(_MODEL_DIR / name, channels=channels, pooled=pooled, noise_map=noise_map,
                            layers=3, width=4, seed=channels)
    return OnnxDenoiser(path, threads=1, noise_sigma="model" if per_pixel else 30.0)


@given(extra=st.integers(0, 40), size=st.integers(1, 9))
def test_reflect_indices_match_numpy_reflect_padding(extra, size):
    # Reference: numpy.pad(mode="reflect"), which a whole-image run of an exported model is padded with.
    signal = np.arange(size)
    expected = np.pad(signal, (0, extra), mode="reflect")
    np.testing.assert_array_equal(signal[reflect_indices(size + extra, size)], expected)


@given(
    height=st.integers(1, 90), width=st.integers(1, 90), tile=st.integers(1, 40),
    radius=st.integers(0, 6), alignment=st.sampled_from([1, 2, 4, 8]), step_factor=st.sampled_from([1, 2]),
)
def test_plan_covers_every_pixel_once_with_aligned_equal_windows(height, width, tile, radius, alignment,
                                                                 step_factor):
    margin = tile_margin(2 * radius + 1, alignment)
    step = alignment * step_factor
    plan = plan_tiles(height, width, tile=tile, margin=margin, alignment=alignment, step=step)
    # Evening out keeps the tile count that the requested edge needs, and never exceeds that edge (on the grid).
    for size, kept in zip((plan.padded_height, plan.padded_width), plan.tile):
        assert kept % step == 0 and kept <= -(-tile // step) * step
        assert -(-size // kept) == -(-size // (-(-tile // step) * step))
    covered = np.zeros((height, width), int)
    shapes = set()
    for t in plan.tiles:
        y0, y1, x0, x1 = t.window
        ky0, ky1, kx0, kx1 = t.keep
        shapes.add((y1 - y0, x1 - x0))
        assert y0 % alignment == x0 % alignment == 0 and (y1 - y0) % alignment == (x1 - x0) % alignment == 0
        assert 0 <= y0 and y1 <= plan.padded_height and 0 <= x0 and x1 <= plan.padded_width
        # Each kept pixel is at least the margin away from any window edge that is not an image border.
        assert y0 == 0 or ky0 - y0 >= margin
        assert x0 == 0 or kx0 - x0 >= margin
        assert y1 == plan.padded_height or y1 - ky1 >= margin
        assert x1 == plan.padded_width or x1 - kx1 >= margin
        covered[ky0:ky1, kx0:kx1] += 1
    assert len(shapes) == 1
    assert np.all(covered == 1)


@pytest.mark.parametrize("receptive_field", [3, 21, 41, 81])
def test_default_tile_keeps_overlap_cost_within_budget(receptive_field):
    margin = tile_margin(receptive_field, 4)
    tile = default_tile(margin, 4)
    assert overlap_cost(tile, margin) <= MAX_OVERLAP_COST
    assert tile % 16 == 0 and tile % 4 == 0


def test_evened_out_tiles_waste_less_than_fixed_ones():
    # A 2048-pixel image at a 288-pixel largest edge: 8 tiles of 256 kept pixels, not 7 of 288 and a sliver.
    plan = plan_tiles(2048, 2048, tile=288, margin=10)
    assert plan.tile == (256, 256) and plan.rows == 8
    assert plan.computed_pixels < 2048**2 * (1 + overlap_cost(256, 10)) + 1


def test_pad_to_alignment_is_numpy_reflect():
    image = np.arange(5 * 7).reshape(5, 7, 1)
    expected = np.pad(image, ((0, 3), (0, 1), (0, 0)), mode="reflect")
    np.testing.assert_array_equal(pad_to_alignment(image, 8)[:, :8], expected)


@settings(max_examples=25, deadline=None)
@given(
    height=st.integers(1, 70), width=st.integers(1, 70), tile=st.integers(1, 48),
    channels=st.sampled_from([1, 2, 3]), pooled=st.booleans(), noise_map=st.booleans(),
    per_pixel=st.booleans(), ensemble=st.sampled_from([1, 1, 2, 8]), seed=st.integers(0, 2**16),
)
def test_tiled_equals_whole_for_test_graphs(height, width, tile, channels, pooled, noise_map, per_pixel, ensemble,
                                            seed):
    # Strips of one pixel and images smaller than one tile are in range; the reference is the same graph run
    # once on the whole padded image.
    denoiser = _graph_denoiser(channels, pooled, noise_map, per_pixel and noise_map)
    denoiser.tile, denoiser.ensemble, denoiser.batch = tile, ensemble, 1 + seed % 3
    image = np.random.default_rng(seed).uniform(0, NATIVE_HIGH, (height, width, channels)).astype(np.float32)
    tiled = denoiser.run(image, as_float=True)
    whole = denoiser.run_whole(image)
    assert tiled.shape == image.shape
    assert np.max(np.abs(tiled - whole)) / NATIVE_HIGH <= 1e-5


# Tiny sizes of every registered architecture; the property test below fails if one is registered without a size.
TINY_HYPER = {
    "residual": {"depth": 3, "width": 6},
    "residual-noisemap": {"depth": 3, "width": 6},
    "unet-small": {"levels": 3, "width": 4},
    "unet-halfres": {"levels": 2, "width": 4},
    "unet-stack": {"frames": 3, "levels": 2, "width": 4},  # its stack window: tests/test_stack_window.py
    "unet-noisemap": {"levels": 2, "width": 4},
}
SINGLE_FRAME = sorted(name for name in TINY_HYPER if "frames" not in TINY_HYPER[name])


@functools.cache
def _exported_denoiser(name: str, channels: int, anscombe: bool) -> OnnxDenoiser:
    """Export a randomly initialised registered architecture (needs torch; the runtime itself does not)."""
    from grainwright.inference.images.normalization import Normalization
    from grainwright.models.checkpoint import new_checkpoint, save_checkpoint
    from grainwright.models.export import export_checkpoint

    normalization = Normalization(dtype="uint16", bit_depth=12, low=0.0, high=4095.0, channels=channels)
    if anscombe:
        normalization = normalization.with_anscombe(gain=0.01, read=0.005)
    stem = f"{name}-c{channels}-a{int(anscombe)}"
    payload = new_checkpoint(name, channels, normalization, hyper=TINY_HYPER[name], seed=channels,
                             training_noise={"sigma_native": 40.0})
    checkpoint = save_checkpoint(_MODEL_DIR / f"{stem}.pt", payload)
    export_checkpoint(checkpoint, _MODEL_DIR / f"{stem}.onnx", threads=1)
    return OnnxDenoiser(_MODEL_DIR / f"{stem}.onnx", threads=1, noise_sigma="training")


def test_every_registered_architecture_has_a_tiny_size():
    from grainwright.models.registry import MODELS

    assert set(MODELS) <= set(TINY_HYPER)


@settings(max_examples=30, deadline=None)
@given(
    name=st.sampled_from(SINGLE_FRAME), channels=st.sampled_from([1, 2, 3]), anscombe=st.booleans(),
    height=st.integers(1, 72), width=st.integers(1, 72), tile=st.integers(1, 48), seed=st.integers(0, 2**16),
)
def test_tiled_equals_whole_for_exported_architectures(name, channels, anscombe, height, width, tile, seed):
    # Exported from randomly initialised models; the reference is the same ONNX file run once on the whole image
    # (padded by reflection to the alignment, as export's own parity check pads). 1e-5 of the range = working units.
    denoiser = _exported_denoiser(name, channels, anscombe)
    denoiser.tile, denoiser.batch = tile, 1 + seed % 4
    image = np.random.default_rng(seed).uniform(0, 4095, (height, width, channels)).astype(np.float32)
    tiled = denoiser.run(image, as_float=True)
    whole = denoiser.run_whole(image)
    assert np.max(np.abs(tiled - whole)) / 4095.0 <= 1e-5


@pytest.mark.parametrize("ensemble", [2, 8])
def test_self_ensemble_tiled_equals_whole_for_residual(ensemble):
    denoiser = _exported_denoiser("residual", 1, False)
    denoiser.tile, denoiser.ensemble = 16, ensemble
    try:
        image = np.random.default_rng(ensemble).uniform(0, 4095, (45, 38, 1)).astype(np.float32)
        assert np.max(np.abs(denoiser.run(image, as_float=True) - denoiser.run_whole(image))) / 4095.0 <= 1e-5
    finally:
        denoiser.ensemble = 1
