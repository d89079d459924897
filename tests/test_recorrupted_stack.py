"""``recorrupted-stack``: Recorrupted-to-Recorrupted on K-frame windows (Pang et al., CVPR 2021). The noise
correlation between frames is measured per offset and the recorruption drawn with it, so input and target noise
are uncorrelated also when the frames' noise is correlated; a correlation above the limit and banding left in the
frames are refused, and a model trained on pure-noise stacks (independent or correlated between frames) outputs
the mean."""
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
from grainwright.trainer.schemes.recorrupted_stack import (
    RecorruptedStack,
    correlation_matrix,
    frame_noise_correlation,
    frame_noise_correlations,
)
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


def test_the_correlation_is_measured_per_offset_and_the_largest_taken():
    """Whole stacks ``(N, H, W, C)``; a 5-frame window's frames lie 1 to 4 frames apart. Reference: the first-order
    autoregression that draws the noise, whose correlation ``d`` frames apart is ``rho**d`` (Box and Jenkins,
    "Time Series Analysis", the AR(1) autocorrelation function): 0.5, 0.25, 0.125, 0.0625 for rho = 0.5; the
    tolerance 0.08 is the per-pair test's above."""
    rng = np.random.default_rng(5)
    independent = _pure_noise_stack(rng, 12, 64, False)[0].astype(np.float64)[..., None]
    assert np.all(np.abs(frame_noise_correlations([independent, independent[::-1]], 5)) < 0.1)
    correlated = _pure_noise_stack(rng, 24, 64, False, correlation=0.5)[0].astype(np.float64)[..., None]
    per_offset = frame_noise_correlations([correlated], 5)
    assert len(per_offset) == 4
    assert np.all(np.abs(np.array(per_offset) - 0.5 ** np.arange(1, 5)) < 0.08), per_offset
    assert frame_noise_correlation([correlated], 5) == max(per_offset, key=abs)
    assert len(frame_noise_correlations([correlated], 3)) == 2


def test_the_correlation_matrix_is_toeplitz_and_positive_semi_definite():
    """The AR(1) correlations (a valid correlation sequence) give their Toeplitz matrix unchanged; an impossible
    set (neighbours correlated 0.9 but frames two apart not at all: the Toeplitz matrix has the eigenvalue
    1 - 0.9 sqrt 2 < 0) is repaired to a symmetric matrix with a unit diagonal and no negative eigenvalue
    (reference: numpy's ``eigvalsh``), closer to the request than the identity is."""
    ar1 = correlation_matrix([0.5, 0.25, 0.125, 0.0625])
    expected = 0.5 ** np.abs(np.arange(5)[:, None] - np.arange(5)[None, :])
    np.testing.assert_allclose(ar1, expected, atol=1e-12)
    requested = np.array([[1, 0.9, 0], [0.9, 1, 0.9], [0, 0.9, 1]])
    assert np.linalg.eigvalsh(requested).min() < -0.2
    repaired = correlation_matrix([0.9, 0.0])
    np.testing.assert_allclose(repaired, repaired.T, atol=1e-12)
    np.testing.assert_allclose(np.diag(repaired), 1.0, atol=1e-12)
    assert np.linalg.eigvalsh(repaired).min() > -1e-9
    assert np.abs(repaired - requested).max() < np.abs(np.eye(3) - requested).max()


def _recorrupted(window, sigma, alpha, per_offset, rng):
    """The scheme's batch on ``window`` ``(N, K, H, W)``, with the recorruption drawn with the correlations
    ``per_offset`` between frames (None: independent draws, as before correlated draws existed)."""
    figures = None if per_offset is None else {"recorruption_correlation": correlation_matrix(per_offset).tolist()}
    scheme = RecorruptedStack({"recorrupted": {"alpha": alpha}}, sigma=np.array([sigma]), figures=figures)
    return scheme.prepare({"noisy": window, "noisy_b": window}, rng)


def test_the_recorruption_is_drawn_with_the_requested_correlation_between_frames():
    """The draws ``z = (input - noisy) / alpha`` of a 5-frame window: standard deviation sigma in every frame and
    the requested correlation between every two frames, within 4 standard errors of a sample correlation,
    ``(1 - rho^2) / sqrt(n)`` for ``n`` normal pairs (Fisher 1915; the large-sample standard error)."""
    rng = np.random.default_rng(11)
    sigma, alpha = 0.05, 0.5
    window = np.full((256, 5, 16, 16), 0.5, np.float32)
    requested = correlation_matrix([0.3, 0.09, 0.027, 0.0081])  # AR(1) of 0.3, the generated volume's
    batch = _recorrupted(window, sigma, alpha, [0.3, 0.09, 0.027, 0.0081], rng)
    draws = ((batch["input"] - batch["noisy"]) / alpha).transpose(1, 0, 2, 3).reshape(5, -1)
    count = draws.shape[1]
    assert np.all(np.abs(draws.std(axis=1) / sigma - 1) < 4 / np.sqrt(2 * count)), draws.std(axis=1)
    measured = np.corrcoef(draws)
    tolerance = 4 * (1 - requested**2) / np.sqrt(count) + 1e-9
    assert np.all(np.abs(measured - requested) <= tolerance), measured


@pytest.mark.parametrize(("correlation", "seed"), [(0.0, 0), (0.0, 1), (0.3, 2), (0.5, 3), (0.8, 4)])
def test_input_and_target_noise_are_uncorrelated_across_all_frames(correlation, seed):
    """Pang et al. 2021: with z ~ N(0, Sigma) for noise of covariance Sigma, the noise of ``y + alpha z`` and of
    ``y - z / alpha`` have cross-covariance Sigma - Sigma = 0. Here for every frame of the window against the
    centre frame's target, on pure Gaussian noise of the stated sigma, independent or correlated between frames
    (AR(1): ``correlation**d`` at ``d`` frames, the true correlations given to the scheme). Controls: with no
    recorruption the target is the centre frame itself (correlated ``1 / sqrt(1 + alpha^2)`` = 0.89 with the
    input's centre frame); with independent draws on correlated noise a neighbour keeps
    ``rho sigma^2`` of the target's noise: correlation ``rho alpha / (1 + alpha^2)`` (0.2 for rho 0.5)."""
    rng = np.random.default_rng(seed)
    sigma, alpha, count = 0.05, 0.5, 256
    noise = rng.normal(0, sigma, (count, 5, 16, 16))
    for frame in range(1, 5):  # AR(1) along the frames, as the generated volume draws its slices
        noise[:, frame] = correlation * noise[:, frame - 1] + np.sqrt(1 - correlation**2) * noise[:, frame]
    window = (0.5 + noise).astype(np.float32)
    true = [correlation**d for d in range(1, 5)]
    batch = _recorrupted(window, sigma, alpha, true, rng)
    target = batch["target"][:, 0].ravel()
    for frame in range(5):
        measured = np.corrcoef(batch["input"][:, frame].ravel(), target)[0, 1]
        assert abs(measured) < 0.02, (frame, measured)
    control = np.corrcoef(batch["input"][:, 2].ravel(), batch["noisy"][:, 2].ravel())[0, 1]
    assert control > 0.85
    assert batch["input"].shape == window.shape and batch["target"].shape == (count, 1, 16, 16)
    if correlation:
        independent = _recorrupted(window, sigma, alpha, None, rng)
        leaked = np.corrcoef(independent["input"][:, 1].ravel(), independent["target"][:, 0].ravel())[0, 1]
        assert abs(leaked - correlation * alpha / (1 + alpha**2)) < 0.02, leaked


NOISE_TOML = 'kind = "gaussian"\nsigma = {sigma}\n'


def _with_noise_description(root):
    """The pure-noise stacks' Gaussian noise (TEMPORAL DN of 12 bits) described, in working units."""
    (root / "noise.toml").write_text(NOISE_TOML.format(sigma=TEMPORAL / 4095))
    return root


RAISED_LIMIT = "recorrupted.max_frame_correlation=0.8"  # for noise known to be correlated more than the default's 0.4


def test_noise_correlated_above_the_limit_is_refused(tmp_path):
    """Noise correlated 0.5 between neighbouring frames, above the default ``recorrupted.max_frame_correlation``
    (0.4): the run stops before training, saying what it measured and what to use instead, and writes nothing."""
    data = _with_noise_description(_write_stacks(tmp_path / "data", False, size=64, correlation=0.5))
    with pytest.raises(ConfigError, match="correlated 0.[4-6].*max_frame_correlation = 0.4.*neighbor2neighbor-stack"):
        train_command(None, str(data), scheme="recorrupted-stack", steps=1, out=str(tmp_path / "run"),
                      assignments=TINY, announce=lambda line: None)
    assert not (tmp_path / "run").exists()


@pytest.mark.parametrize(("noise", "first", "second"), [
    ({"repeated": False, "correlation": 0.5}, 0.5, 0.25),
    ({"repeated": True, "kind": "pixel"}, 0.2, 0.2),
])
def test_noise_shared_by_the_frames_trains_with_correlated_draws(tmp_path, noise, first, second):
    """Noise correlated 0.5 between neighbouring frames (AR(1): 0.25 two frames apart), or a pixel pattern
    repeated in every frame (standard deviation 100 DN against 200 DN drawn per frame: correlation
    100^2 / (100^2 + 200^2) = 0.2 at every offset): the run trains, and its summary records the correlation per
    offset and the 3 x 3 matrix the recorruption was drawn with (within 0.08, the per-pair test's tolerance).
    The limit is raised to 0.8 for the former (the default 0.4 refuses it, above)."""
    data = _with_noise_description(_write_stacks(tmp_path / "data", size=64, **noise))
    summary, _ = train_command(None, str(data), scheme="recorrupted-stack", steps=1, out=str(tmp_path / "run"),
                               assignments=TINY + [RAISED_LIMIT], announce=lambda line: None)
    per_offset, matrix = summary["frame_noise_correlations"], np.array(summary["recorruption_correlation"])
    assert abs(per_offset[0] - first) < 0.08 and abs(per_offset[1] - second) < 0.08, per_offset
    assert matrix.shape == (3, 3) and np.allclose(np.diag(matrix), 1.0)
    assert abs(matrix[0, 1] - per_offset[0]) < 0.05 and abs(matrix[0, 2] - per_offset[1]) < 0.05, matrix


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


def _assert_about_the_mean(output: np.ndarray, centre: np.ndarray) -> None:
    """A model trained on pure noise outputs about the mean, with no share of the centre frame copied (the
    identity would keep all of its spread, correlation 1 and least-squares slope 1)."""
    slope = np.cov(output.ravel(), centre.ravel())[0, 1] / np.var(centre)
    figures = (f"output mean {output.mean():.0f}, std {output.std():.0f}; input mean {centre.mean():.0f}, "
               f"std {centre.std():.0f}; slope {slope:.2f}")
    assert abs(output.mean() - centre.mean()) < 0.5 * TEMPORAL, figures
    assert np.std(output) < 0.5 * np.std(centre), figures
    assert abs(np.corrcoef(output.ravel(), centre.ravel())[0, 1]) < 0.2, figures
    assert abs(slope) < 0.05, figures


@pytest.mark.slow
@pytest.mark.parametrize("correlation", [0.0, 0.3, 0.5])
def test_a_model_trained_on_pure_noise_stacks_outputs_the_mean(tmp_path, correlation):
    """Pure noise has nothing to learn but its mean, independent between frames or correlated ``correlation``
    between neighbouring frames (AR(1), as the generated volume draws its slices). The model starts as the
    identity (its skip hands the centre frame through); reaching the mean shows the recorrupted target gives it
    no reason to copy the input's centre frame or its neighbours, whose noise shares ``correlation`` with the
    centre frame's. The share of the centre frame the output copies (least-squares slope; the identity copies 1)
    is checked too. The noise level is given (noise.toml), so the limit is raised for 0.5. Measured once (2,000
    steps), correlation with the centre frame / slope: correlated draws -0.07 / -0.01 (independent noise), -0.11 /
    -0.02 (0.3), 0.01 / 0.00 (0.5), 0.01 / 0.00 (0.8); the independent draws used before on the same correlated
    noise 0.22 / 0.05 (0.3), 0.42 / 0.16 (0.5), 0.68 / 0.34 (0.8), which these bounds reject."""
    data = _with_noise_description(_write_stacks(tmp_path / "data", False, size=48, correlation=correlation))
    summary, run = train_command(None, str(data), scheme="recorrupted-stack", steps=2000, out=str(tmp_path / "run"),
                                 assignments=TINY + ["optim.lr=0.003", "optim.final_lr_fraction=1.0", RAISED_LIMIT],
                                 announce=lambda line: None)
    assert summary["scheme"] == "recorrupted-stack"
    assert abs(summary["frame_noise_correlations"][0] - correlation) < 0.1, summary["frame_noise_correlations"]
    output, centre, _ = _trained_output(run, repeated=False, correlation=correlation)
    _assert_about_the_mean(output, centre)


@pytest.mark.slow
def test_with_aligned_neighbours_a_model_trained_on_pure_noise_stacks_outputs_the_mean(tmp_path):
    """``model.align_neighbours = "optical-flow"``: input = the neighbours warped by a flow estimated from the noisy
    frames (centre frame included) plus ``alpha z``, target = the centre frame minus ``z / alpha``. The warped
    neighbours depend on the centre frame's noise only through the flow; reaching the mean, with no share of the
    centre frame copied (least-squares slope), shows that this dependence gives the model little to copy. Measured
    once (2,000 steps): flow on frames smoothed by 1 pixel (``FLOW_SMOOTHING``) output/input standard deviation
    27 / 200, correlation with the centre frame 0.08, slope 0.01; flow on the unsmoothed noisy frames 50 / 200,
    0.22, 0.05, which these bounds reject (on pure noise the flow has no structure to hold it and follows the
    noise); with the zero-motion test, the flow's median filter and the cubic warp added (the alignment now)
    24 / 200, 0.04, 0.004."""
    data = _with_noise_description(_write_stacks(tmp_path / "data", False, size=48))
    summary, run = train_command(None, str(data), scheme="recorrupted-stack", steps=2000, out=str(tmp_path / "run"),
                                 assignments=TINY + ["optim.lr=0.003", "optim.final_lr_fraction=1.0",
                                                     'model.align_neighbours="optical-flow"'],
                                 announce=lambda line: None)
    assert summary["align_neighbours"] == "optical-flow"
    output, centre, _ = _trained_output(run, repeated=False, alignment="optical-flow")
    _assert_about_the_mean(output, centre)


def test_a_single_frame_model_with_aligned_neighbours_is_refused(tmp_path):
    data = _with_noise_description(_write_stacks(tmp_path / "data", False, size=48))
    single = [a for a in TINY if not a.startswith(("model.name", "model.hyper.frames"))] + [
        'model.name="unet-small"', 'model.align_neighbours="optical-flow"']
    with pytest.raises(ConfigError, match="model.align_neighbours = \"optical-flow\": 'unet-small' reads one frame"):
        train_command(None, str(data), scheme="noise2noise", steps=1, out=str(tmp_path / "run"),
                      assignments=single, announce=lambda line: None)
    assert not (tmp_path / "run").exists()


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
    assert "poisson-gaussian noise from the noise description noise.toml" in line, line
    assert re.search(r"largest noise correlation between the window's frames -?0\.0\d \(limit 0.4\)", line), line


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


DRAWN_WITH = r"\): recorrupted-stack, drawing its recorruption with the measured correlation"


@pytest.mark.parametrize(("noise", "settings", "reason"), [
    ({"repeated": False, "correlation": 0.5}, [RAISED_LIMIT], r"frames 0.[4-6]\d \(limit 0.8" + DRAWN_WITH),
    ({"repeated": True, "kind": "pixel"}, [], r"frames 0.[1-3]\d \(limit 0.4" + DRAWN_WITH),
])
def test_auto_picks_recorrupted_stack_for_noise_shared_by_the_frames(tmp_path, noise, settings, reason):
    """Noise correlated between frames within the limit: ``recorrupted-stack``, saying it draws the correlation."""
    data = _write_stacks(tmp_path / "data", size=64, **noise)
    (data / "noise.toml").write_text(PG_NOISE_TOML)
    scheme, line = _auto_choice(data, TINY + settings)
    assert scheme == "recorrupted-stack", line
    assert re.search(reason, line), line


def test_auto_picks_neighbor2neighbor_stack_above_the_correlation_limit(tmp_path):
    data = _write_stacks(tmp_path / "data", False, size=64, correlation=0.5)
    (data / "noise.toml").write_text(PG_NOISE_TOML)
    scheme, line = _auto_choice(data)
    assert scheme == "neighbor2neighbor-stack", line
    assert re.search(r"frames is correlated 0.[4-6]\d \(recorrupted.max_frame_correlation = 0.4\)", line), line


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
