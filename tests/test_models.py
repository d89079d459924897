"""The architecture registry: shapes, size figures, receptive field, alignment, skip and batch-norm folding."""
from __future__ import annotations

import pytest
import torch
from torch.utils.flop_counter import FlopCounterMode

from grainwright.inference.common.errors import ConfigError
from grainwright.models.registry import MODELS, build_model, hyper_defaults

torch.set_num_threads(1)

# Tiny sizes: the checks are structural, they hold at every size.
TINY = {
    "residual": {"depth": 4, "width": 6},
    "residual-noisemap": {"depth": 4, "width": 6},
    "unet-small": {"levels": 2, "width": 4},
    "unet-halfres": {"levels": 2, "width": 4},
    "unet-stack": {"frames": 3, "levels": 2, "width": 4},
    "unet-noisemap": {"levels": 2, "width": 4},
}


def _inputs(model, height, width, dtype=torch.float32, seed=0):
    generator = torch.Generator().manual_seed(seed)
    image = torch.rand(2, model.input_channels, height, width, generator=generator, dtype=dtype)
    sigma = torch.full((2, 1, height, width), 0.05, dtype=dtype) if model.takes_noise_map else None
    return image, sigma


def test_every_registered_architecture_has_a_tiny_size():
    assert set(TINY) == set(MODELS)


@pytest.mark.parametrize("name", sorted(MODELS))
@pytest.mark.parametrize("channels", [1, 3, 5])
@pytest.mark.parametrize("skip", [True, False])
def test_shape_in_equals_shape_out(name, channels, skip):
    model = build_model(name, channels, skip=skip, **TINY[name]).eval()
    side = 4 * model.alignment
    image, sigma = _inputs(model, side, 2 * side)
    assert model(image, sigma).shape == (2, channels, side, 2 * side)  # a multi-frame model: the centre frame
    assert model.receptive_field % 2 == 1
    assert model.tile_margin >= model.receptive_radius and model.tile_margin % model.alignment == 0


@pytest.mark.parametrize("name", sorted(MODELS))
def test_default_sizes_are_small_cpu_networks(name):
    model = build_model(name, 1)
    assert model.hyper == hyper_defaults(name)
    assert 10_000 < model.parameter_count() < 2_000_000
    # CPU-sized (rule of thumb, no source): at the ~170 GFLOP/s the models issue measured, 250k MACs/px is ~0.3 MP/s.
    assert model.macs_per_pixel() < 250_000


@pytest.mark.parametrize("name", sorted(MODELS))
def test_macs_per_pixel_matches_pytorch_flop_counter(name):
    # Reference: torch.utils.flop_counter.FlopCounterMode counts 2 FLOPs per multiply-accumulate of each conv.
    model = build_model(name, 3, **TINY[name]).eval()
    image, sigma = _inputs(model, 8 * model.alignment, 8 * model.alignment)
    with FlopCounterMode(display=False) as counter:
        model(image[:1], None if sigma is None else sigma[:1])
    pixels = image.shape[2] * image.shape[3]
    assert counter.get_total_flops() / 2 / pixels == pytest.approx(model.macs_per_pixel())


@pytest.mark.parametrize("name", sorted(MODELS))
def test_parameter_count_matches_the_state_dict(name):
    model = build_model(name, 2, **TINY[name])
    weights = sum(value.numel() for key, value in model.state_dict().items() if "running" not in key and "num_batches" not in key)
    assert model.parameter_count() == weights


@pytest.mark.parametrize("name", sorted(MODELS))
@pytest.mark.parametrize("skip", [True, False])
def test_receptive_field_is_confirmed_by_single_pixel_changes(name, skip):
    """Changing one input pixel changes outputs only within the analytic radius, and it reaches that radius.

    The reach of a U-Net depends on where the pixel sits on the pooling grid, so every offset of one alignment
    period is tried. Float64 keeps rounding from blurring exact zeros.
    """
    torch.manual_seed(1)
    model = build_model(name, 2, skip=skip, **TINY[name]).double().eval()
    radius = model.receptive_radius
    side = model.alignment * -(-(4 * radius + 8) // model.alignment)
    image, sigma = _inputs(model, side, side, dtype=torch.float64)
    image, sigma = image[:1], None if sigma is None else sigma[:1]
    with torch.no_grad():
        reference = model(image, sigma)
        reach = 0
        for offset in range(model.alignment):
            row = col = side // 2 + offset
            changed = image.clone()
            changed[0, 1, row, col] += 1.0
            difference = (model(changed, sigma) - reference).abs().amax(dim=(0, 1))
            rows, cols = torch.nonzero(difference > 1e-12, as_tuple=True)
            assert len(rows) > 0
            distance = torch.maximum((rows - row).abs(), (cols - col).abs()).max().item()
            assert distance <= radius, f"response {distance} px away, analytic radius {radius}"
            reach = max(reach, distance)
    assert reach == radius


def test_unet_alignment_and_receptive_field_grow_with_levels():
    two = build_model("unet-small", 1, levels=2, width=4)
    three = build_model("unet-small", 1, levels=3, width=4)
    assert (two.alignment, three.alignment) == (4, 8)
    assert three.receptive_field > 2 * two.receptive_field - 10
    residual = build_model("residual", 1)
    assert three.receptive_field > residual.receptive_field  # a large receptive field at lower cost
    assert build_model("unet-small", 1).macs_per_pixel() < residual.macs_per_pixel()


@pytest.mark.parametrize("name", ["residual", "residual-noisemap"])
def test_batch_norm_folds_into_the_convolutions(name):
    torch.manual_seed(2)
    model = build_model(name, 3, depth=5, width=8, batch_norm=True)
    model.train()
    with torch.no_grad():  # move the running statistics away from their initial values
        for _ in range(5):
            image, sigma = _inputs(model, 16, 16, seed=_)
            model(image * 3.0 + 1.0, sigma)
    model.eval()
    folded = model.for_export()
    assert not any(isinstance(m, torch.nn.BatchNorm2d) for m in folded.modules())
    assert any(isinstance(m, torch.nn.BatchNorm2d) for m in model.modules())  # the original is untouched
    image, sigma = _inputs(model, 23, 17, seed=9)
    with torch.no_grad():
        assert torch.allclose(model(image, sigma), folded(image, sigma), atol=1e-5)


def test_without_skip_the_network_output_is_the_prediction():
    torch.manual_seed(3)
    with_skip = build_model("residual", 1, depth=3, width=4, skip=True).eval()
    without = build_model("residual", 1, depth=3, width=4, skip=False).eval()
    without.load_state_dict(with_skip.state_dict())
    image, _ = _inputs(with_skip, 12, 12)
    with torch.no_grad():
        assert torch.allclose(with_skip(image), image - without(image))


def test_noise_map_changes_the_output():
    torch.manual_seed(4)
    model = build_model("residual-noisemap", 1, depth=3, width=4).eval()
    image, sigma = _inputs(model, 12, 12)
    with torch.no_grad():
        assert not torch.allclose(model(image, sigma), model(image, 4 * sigma))
    with pytest.raises(ValueError, match="noise_sigma"):
        model(image)


def test_unknown_names_get_a_suggestion():
    with pytest.raises(ConfigError, match="did you mean 'residual'"):
        build_model("residul", 1)
    with pytest.raises(ConfigError, match="did you mean 'depth'"):
        build_model("residual", 1, dept=3)
    with pytest.raises(ConfigError, match="levels must be 2 or 3"):
        build_model("unet-small", 1, levels=5)


def test_stack_model_reach_along_the_stack_is_its_window():
    """A change in any of the K frames reaches the output, a frame outside the window cannot (it is not an
    input); the first convolution alone grows with K (9 (K - 1) C width more MACs per pixel)."""
    torch.manual_seed(5)
    model = build_model("unet-stack", 1, frames=5, levels=2, width=4).double().eval()
    assert model.stack_receptive_field == 5 and model.describe()["stack_frames"] == 5
    single = build_model("unet-small", 1, levels=2, width=4)
    assert model.receptive_field == single.receptive_field
    assert model.macs_per_pixel() - single.macs_per_pixel() == 9 * 4 * 1 * 4
    image, _ = _inputs(model, 16, 16, dtype=torch.float64)
    with torch.no_grad():
        reference = model(image)
        for frame in range(5):
            changed = image.clone()
            changed[0, frame, 8, 8] += 1.0
            assert (model(changed) - reference).abs().max() > 1e-9, f"frame {frame} does not reach the output"


def test_stack_model_skip_subtracts_from_the_centre_frame():
    torch.manual_seed(6)
    with_skip = build_model("unet-stack", 2, frames=3, levels=2, width=4, skip=True).eval()
    without = build_model("unet-stack", 2, frames=3, levels=2, width=4, skip=False).eval()
    without.load_state_dict(with_skip.state_dict())
    image, _ = _inputs(with_skip, 12, 12)
    with torch.no_grad():
        assert torch.allclose(with_skip(image), image[:, 2:4] - without(image))


@pytest.mark.parametrize("frames", [1, 4, 17, 2.5])
def test_stack_model_needs_an_odd_window(frames):
    with pytest.raises(ConfigError, match="frames must be odd"):
        build_model("unet-stack", 1, frames=frames)
def test_unet_noisemap_per_channel_is_the_grayscale_network_on_each_channel():
    # One grayscale network applied channel by channel: the same output as the 1-channel model on each plane.
    colour = build_model("unet-noisemap", 3, per_channel=True, **TINY["unet-noisemap"]).eval()
    gray = build_model("unet-noisemap", 1, **TINY["unet-noisemap"]).eval()
    gray.load_state_dict(colour.state_dict())
    image, sigma = _inputs(colour, 16, 24)
    with torch.no_grad():
        output = colour(image, sigma)
        for channel in range(3):
            torch.testing.assert_close(output[:, channel:channel + 1], gray(image[:, channel:channel + 1], sigma))
    # Reference: torch.utils.flop_counter.FlopCounterMode, 2 FLOPs per multiply-accumulate.
    with FlopCounterMode(display=False) as counter:
        colour(image[:1], sigma[:1])
    assert counter.get_total_flops() / 2 / (16 * 24) == pytest.approx(colour.macs_per_pixel())
    assert colour.macs_per_pixel() == pytest.approx(3 * gray.macs_per_pixel())
