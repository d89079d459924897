"""``recorrupted-stack``: Recorrupted-to-Recorrupted on K-frame windows (Pang et al., CVPR 2021). Its input and
target noise are uncorrelated when the frames' noise is independent; noise correlated between frames (or
banding left in the frames) is measured and refused, and a model trained on pure-noise stacks outputs the mean."""
from __future__ import annotations

import re

import numpy as np
import pytest
import tifffile

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images.transforms import anscombe_forward
from grainwright.inference.noise.estimation import interframe_noise_correlation
from grainwright.inference.synthetic.stack_scenario import cast_volume, conveyor_sequence
from grainwright.trainer.config import load_config
from grainwright.trainer.run import train_command
from grainwright.trainer.schemes.recorrupted_stack import RecorruptedStack, frame_noise_correlation
from test_stack_training import TEMPORAL, TINY, _pure_noise_stack, _trained_output, _write_stacks


@pytest.mark.parametrize("correlation", [0.0, 0.3, 0.5, 0.8])
def test_the_noise_correlation_between_frames_is_measured(correlation):
    """Reference: the first-order autoregression that draws the noise (correlation ``correlation`` between
    neighbouring frames by construction), measured through the wavelet MAD estimator (Donoho and Johnstone 1994)
    of each frame and of their difference; the median over 8 frame pairs of 96 x 96 pixels."""
    rng = np.random.default_rng(int(10 * correlation))
    stack = _pure_noise_stack(rng, 9, 96, False, correlation=correlation)[0].astype(np.float64)
    measured = np.median([interframe_noise_correlation(stack[i], stack[i + 1]) for i in range(8)])
    assert abs(measured - correlation) < 0.08, measured


def test_structure_still_or_moving_is_not_counted_as_correlated_noise():
    """The generated conveyor sequence (independent Poisson-Gaussian noise per frame; a still scene and a lane
    moving 3 pixels per frame), after the Anscombe transform: about 0. The generated cast volume (noise drawn
    correlated 0.3 between neighbouring slices, textured metal): about 0.3."""
    sequence = conveyor_sequence(seed=0)
    stabilised = anscombe_forward(sequence.noisy.astype(np.float64), 8.0, 14.0)  # the sensor: gain 8, read 14 DN
    moving = np.median([interframe_noise_correlation(stabilised[i], stabilised[i + 1]) for i in range(0, 20, 2)])
    assert abs(moving) < 0.05, moving
    volume = cast_volume(seed=0).noisy.astype(np.float64)
    slices = np.median([interframe_noise_correlation(volume[i], volume[i + 1]) for i in range(0, 40, 4)])
    assert abs(slices - 0.3) < 0.08, slices


def test_the_largest_correlation_over_the_window_offsets_is_taken():
    """Whole stacks ``(N, H, W, C)``; a 5-frame window's frames lie 1 and 2 frames from its centre. Noise drawn
    with correlation 0.5 between neighbouring frames (first-order autoregression: 0.25 two frames apart) reads
    about 0.5, the larger of the two offsets."""
    rng = np.random.default_rng(5)
    independent = _pure_noise_stack(rng, 12, 64, False)[0].astype(np.float64)[..., None]
    assert abs(frame_noise_correlation([independent, independent[::-1]], 5)) < 0.1
    correlated = _pure_noise_stack(rng, 12, 64, False, correlation=0.5)[0].astype(np.float64)[..., None]
    assert 0.35 < frame_noise_correlation([correlated], 5) < 0.65
    assert frame_noise_correlation([correlated], 3) > 0.35  # offset 1 alone


@pytest.mark.parametrize("seed", range(3))
def test_input_and_target_noise_are_uncorrelated_for_independent_frames(seed):
    """Pang et al. 2021: with z ~ N(0, sigma^2), the noise of ``y + alpha z`` and of ``y - z / alpha`` have
    covariance sigma^2 - sigma^2 = 0. Here for every frame of the window against the centre frame's target, on
    pure Gaussian noise of the stated sigma; the control (no recorruption: the target is the centre frame itself)
    is fully correlated with the input's centre frame."""
    rng = np.random.default_rng(seed)
    sigma = 0.05
    window = rng.normal(0.5, sigma, (256, 5, 16, 16)).astype(np.float32)
    scheme = RecorruptedStack({"recorrupted": {"alpha": 0.5}}, sigma=np.array([sigma]))
    batch = scheme.prepare({"noisy": window, "noisy_b": window}, rng)
    target = batch["target"][:, 0].ravel()
    for frame in range(5):
        correlation = np.corrcoef(batch["input"][:, frame].ravel(), target)[0, 1]
        assert abs(correlation) < 0.02, (frame, correlation)
    control = np.corrcoef(batch["input"][:, 2].ravel(), batch["noisy"][:, 2].ravel())[0, 1]
    assert control > 0.85  # 1 / sqrt(1 + alpha^2) = 0.89
    assert batch["input"].shape == window.shape and batch["target"].shape == (256, 1, 16, 16)


NOISE_TOML = 'kind = "gaussian"\nsigma = {sigma}\n'


def _with_noise_description(root):
    """The pure-noise stacks' Gaussian noise (TEMPORAL DN of 12 bits) described, in working units."""
    (root / "noise.toml").write_text(NOISE_TOML.format(sigma=TEMPORAL / 4095))
    return root


@pytest.mark.parametrize(("noise", "message"), [
    ({"repeated": False, "correlation": 0.5}, "correlated 0.[3-6]"),
    ({"repeated": True, "kind": "pixel"}, "correlated 0.[1-3]"),
])
def test_noise_shared_by_the_frames_is_refused(tmp_path, noise, message):
    """Noise correlated 0.5 between neighbouring frames, or a pixel pattern repeated in every frame (standard
    deviation 100 DN against 200 DN drawn per frame: correlation 0.2), would reach the network through the
    neighbours: the run stops before training, saying what it measured and what to use instead."""
    data = _with_noise_description(_write_stacks(tmp_path / "data", size=64, **noise))
    with pytest.raises(ConfigError, match=f"{message}.*neighbor2neighbor-stack"):
        train_command(None, str(data), scheme="recorrupted-stack", steps=1, out=str(tmp_path / "run"),
                      assignments=TINY, announce=lambda line: None)
    assert not (tmp_path / "run").exists()


def test_banding_left_in_the_frames_is_refused():
    """Row offsets are not white: the recorruption does not decorrelate them even in the centre frame."""
    config = load_config(None)
    with pytest.raises(ConfigError, match="banding"):
        RecorruptedStack.check_data(config, [np.zeros((6, 16, 16, 1), np.float32)], 3, banding_left=True)


def _banded_stacks(root):
    """Pure-noise stacks with strong row offsets drawn afresh in every frame."""
    rng = np.random.default_rng(8)
    (root / "noisy-stacks").mkdir(parents=True)
    for index in range(2):
        stack = 2000 + rng.normal(0, 200, (10, 64, 64)) + rng.normal(0, 200, (10, 64, 1))
        stack = np.clip(np.rint(stack), 0, 4095).astype(np.uint16)
        tifffile.imwrite(root / "noisy-stacks" / f"stack{index}.tif", stack)
    return root


def test_banding_is_refused_unless_corrected(tmp_path):
    data = _with_noise_description(_banded_stacks(tmp_path / "data"))
    with pytest.raises(ConfigError, match="banding"):
        train_command(None, str(data), scheme="recorrupted-stack", steps=1, out=str(tmp_path / "run"),
                      assignments=TINY, announce=lambda line: None)
    corrected = [a for a in TINY if not a.startswith("data.fixed_pattern")] + ['data.fixed_pattern="always"']
    summary, _ = train_command(None, str(data), scheme="recorrupted-stack", steps=1, out=str(tmp_path / "ok"),
                               assignments=corrected, announce=lambda line: None)
    assert summary["fixed_pattern_corrected"] and abs(summary["frame_noise_correlation"]) < 0.1


@pytest.mark.slow
def test_a_model_trained_on_pure_noise_stacks_outputs_the_mean(tmp_path):
    """Pure noise independent between frames has nothing to learn but its mean. The model starts as the identity
    (its skip hands the centre frame through); reaching the mean shows the recorrupted target gives it no reason
    to copy the input's centre frame or its neighbours."""
    data = _with_noise_description(_write_stacks(tmp_path / "data", False, size=48))
    summary, run = train_command(None, str(data), scheme="recorrupted-stack", steps=2000, out=str(tmp_path / "run"),
                                 assignments=TINY + ["optim.lr=0.003", "optim.final_lr_fraction=1.0"],
                                 announce=lambda line: None)
    assert summary["scheme"] == "recorrupted-stack" and abs(summary["frame_noise_correlation"]) < 0.1
    output, centre, _ = _trained_output(run, repeated=False)
    figures = (f"output mean {output.mean():.0f}, std {output.std():.0f}; input mean {centre.mean():.0f}, "
               f"std {centre.std():.0f}")
    assert abs(output.mean() - centre.mean()) < 0.5 * TEMPORAL, figures
    assert np.std(output) < 0.5 * np.std(centre), figures  # the identity keeps all of it
    assert abs(np.corrcoef(output.ravel(), centre.ravel())[0, 1]) < 0.5, figures


# Poisson-Gaussian noise of the pure-noise stacks' level at their mean (12 bits, working units): variance
# gain * 0.488 + read^2 = (200 / 4095)^2 with the read noise 100 DN.
PG_NOISE_TOML = f'kind = "poisson-gaussian"\ngain = {((TEMPORAL**2 - 100.0**2) / 4095**2) / (2000 / 4095):.6g}\nread = {100 / 4095:.6g}\n'


def _auto_choice(data, assignments=TINY):
    """The scheme ``auto`` settles on for ``data`` and the line it announced (nothing is trained)."""
    from grainwright.trainer.run import prepare

    lines = []
    setup, _, _ = prepare(load_config(None, [*assignments, f'data.folder="{data.as_posix()}"']), lines.append)
    said = [line for line in lines if line.startswith("scheme auto:")]
    assert len(said) == 1, lines
    return setup.config["scheme"], said[0]


def test_auto_picks_recorrupted_stack_for_independent_poisson_gaussian_noise(tmp_path):
    """Independent noise between frames and a Poisson-Gaussian noise description: Recorrupted-to-Recorrupted on
    the windows, with the measured correlation in the reason."""
    data = _write_stacks(tmp_path / "data", False, size=48)
    (data / "noise.toml").write_text(PG_NOISE_TOML)
    scheme, line = _auto_choice(data)
    assert scheme == "recorrupted-stack", line
    assert "poisson-gaussian noise from the noise description noise.toml" in line and "independent" in line


def test_auto_picks_recorrupted_stack_on_the_generated_sequence_from_the_analysis(tmp_path):
    """No noise description: the analysis fits the conveyor sequence's Poisson-Gaussian noise confidently (gain 8,
    read 14 DN), its banding is corrected, and the noise is independent between frames."""
    from grainwright.inference.synthetic.stack_scenario import sequence_info, write_stack_pair

    sequence = conveyor_sequence(seed=0)
    data = tmp_path / "data"
    write_stack_pair(data, "conveyor", sequence.noisy, sequence.clean, sequence_info(sequence))
    settings = [a for a in TINY if not a.startswith("data.fixed_pattern")]
    scheme, line = _auto_choice(data, settings)
    assert scheme == "recorrupted-stack", line
    assert "confident fit" in line, line


@pytest.mark.parametrize(("noise", "reason"), [
    ({"repeated": False, "correlation": 0.5}, "neighbouring frames is correlated 0.[3-6]"),
    ({"repeated": True, "kind": "pixel"}, "neighbouring frames is correlated 0.[1-3]"),
])
def test_auto_picks_neighbor2neighbor_stack_for_noise_shared_by_the_frames(tmp_path, noise, reason):
    data = _write_stacks(tmp_path / "data", size=64, **noise)
    (data / "noise.toml").write_text(PG_NOISE_TOML)
    scheme, line = _auto_choice(data)
    assert scheme == "neighbor2neighbor-stack", line
    assert re.search(reason, line), line


def test_auto_picks_neighbor2neighbor_stack_for_banding_left_uncorrected(tmp_path):
    data = _banded_stacks(tmp_path / "data")
    (data / "noise.toml").write_text(PG_NOISE_TOML)
    scheme, line = _auto_choice(data)  # TINY turns the row/column correction off
    assert scheme == "neighbor2neighbor-stack" and "banding is flagged and left uncorrected" in line, line


def test_the_recorruption_strength_defaults_per_scheme(tmp_path):
    """``recorrupted.alpha = "auto"`` (the default) stands for each scheme's measured best: 0.3 single-frame, 1.0
    for K-frame windows; a number applies to both; the run records the strength it used."""
    from grainwright.trainer.run import prepare
    from grainwright.trainer.schemes.recorrupted import Recorrupted

    config = load_config(None)
    assert config["recorrupted"]["alpha"] == "auto"
    assert Recorrupted.alpha_for(config) == 0.3 and RecorruptedStack.alpha_for(config) == 1.0
    given = load_config(None, ["recorrupted.alpha=0.5"])
    assert Recorrupted.alpha_for(given) == RecorruptedStack.alpha_for(given) == 0.5
    with pytest.raises(ConfigError, match="recorrupted.alpha: expected a number or \"auto\""):
        load_config(None, ['recorrupted.alpha="high"'])
    data = _write_stacks(tmp_path / "data", False, size=48)
    (data / "noise.toml").write_text(PG_NOISE_TOML)
    lines = []
    setup, _, _ = prepare(load_config(None, [*TINY, f'data.folder="{data.as_posix()}"']), lines.append)
    assert setup.config["recorrupted"]["alpha"] == setup.summary["recorrupted_alpha"] == 1.0
    assert any(line.startswith("recorruption strength: alpha 1") for line in lines), lines
