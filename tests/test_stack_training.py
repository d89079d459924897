"""Training multi-frame models from noisy stacks only: the sub-sampling never shows the network its target's own
noise (also noise repeated in every frame), a model trained on pure noise outputs the mean, stacks feed the
trainer as windows, and bad stacks are refused naming the file."""
from __future__ import annotations

import numpy as np
import pytest
import tifffile
import torch

from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.images.alignment import aligned_frames
from grainwright.inference.images.normalization import Normalization
from grainwright.inference.runtime.modelinfo import read_model_metadata
from grainwright.models.checkpoint import load_checkpoint, model_from_checkpoint
from grainwright.trainer.config import load_config
from grainwright.trainer.data import stack_windows
from grainwright.trainer.run import stack_pairing, train_command
from grainwright.trainer.schemes.neighbor2neighbor_stack import (
    Neighbor2NeighborStack,
    adjacent_positions,
    pick,
    separated_positions,
)

MEAN, TEMPORAL = 2000.0, 200.0  # 12-bit units
TINY = ['model.name="unet-stack"', "model.hyper.frames=3", "model.hyper.levels=2", "model.hyper.width=4",
        "data.patch_size=16", "data.batch_size=16", "threads=1", "validation.every_steps=250",
        "validation.patches=16", "logging.progress=false", "logging.tensorboard=false",
        "model.channels_last=false", 'model.precision="float32"', 'data.fixed_pattern="never"']


def _fixed_pattern(rng, size, kind="banding-and-pixel"):
    """Noise repeated in every frame: row and column offsets (banding) and a per-pixel pattern, or the per-pixel
    pattern alone."""
    if kind == "pixel":
        return rng.normal(0, 100, (size, size))
    return rng.normal(0, 150, (size, 1)) + rng.normal(0, 150, (1, size)) + rng.normal(0, 100, (size, size))


def _temporal_noise(rng, frames, size, correlation=0.0):
    """Noise of standard deviation TEMPORAL per frame, correlated ``correlation`` between neighbouring frames (a
    first-order autoregression along the stack, as reconstruction filters spread noise across CT slices)."""
    noise = rng.normal(0, TEMPORAL, (frames, size, size))
    for index in range(1, frames):
        noise[index] = correlation * noise[index - 1] + np.sqrt(1 - correlation**2) * noise[index]
    return noise


def _pure_noise_stack(rng, frames, size, repeated, kind="banding-and-pixel", correlation=0.0):
    fixed = _fixed_pattern(rng, size, kind) if repeated else 0.0
    stack = MEAN + fixed + _temporal_noise(rng, frames, size, correlation)
    return np.clip(np.rint(stack), 0, 4095).astype(np.uint16), fixed


def _write_stacks(root, repeated, count=2, frames=12, size=48, seed=0, kind="banding-and-pixel", correlation=0.0):
    rng = np.random.default_rng(seed)
    (root / "noisy-stacks").mkdir(parents=True)
    for index in range(count):
        stack = _pure_noise_stack(rng, frames, size, repeated, kind, correlation)[0]
        tifffile.imwrite(root / "noisy-stacks" / f"stack{index}.tif", stack)
    return root


def _targets_reach_the_input(positions, seed, lines=True):
    """Whether changing every pixel in the rows and columns of the target pixels (``lines``), or the target
    pixels' positions alone, in every frame, changes the sub-sampled input of some patch."""
    rng = np.random.default_rng(seed)
    scheme = Neighbor2NeighborStack({"neighbor2neighbor": {"gamma": 2.0}})
    scheme.positions = positions  # the control swaps the pairing in
    window = rng.normal(size=(8, 5, 16, 16)).astype(np.float32)
    batch = scheme.prepare({"noisy": window, "noisy_b": window}, rng)
    first, second = torch.from_numpy(batch["first"]), batch["second"]
    reached = False
    for n in range(8):
        changed = window.copy()
        if lines:
            rows, cols = np.unique(second[n] // 16), np.unique(second[n] % 16)
            changed[n][:, rows, :] += 1.0
            changed[n][:, :, cols] += 1.0
        else:
            changed[n].reshape(5, -1)[:, second[n].ravel()] += 1.0
        before = pick(torch.from_numpy(window[n:n + 1]), first[n:n + 1])
        after = pick(torch.from_numpy(changed[n:n + 1]), first[n:n + 1])
        reached |= not torch.equal(before, after)
    return reached


@pytest.mark.parametrize("seed", range(5))
def test_no_input_pixel_shares_a_row_or_column_with_a_target_pixel(seed):
    """The input sub-image of every frame is blind to the target pixels' rows and columns, so banding or a fixed
    pattern repeated in every frame cannot be copied from a neighbour. The published adjacent pairing is not
    (the control shows the check can fail)."""
    assert not _targets_reach_the_input(separated_positions, seed)
    assert not _targets_reach_the_input(_per_line_positions, seed)
    assert _targets_reach_the_input(adjacent_positions, seed)


@pytest.mark.parametrize("seed", range(5))
def test_no_input_pixel_lies_at_a_target_position_in_any_frame(seed):
    """Both pairings keep every target position out of the input in every frame of the window, so noise repeated
    at a pixel in every frame (a fixed pixel pattern) or correlated between frames at the same pixel (CT slices)
    never reaches the network from a neighbour. Control: a sampler whose input is the target positions fails."""
    for positions in (adjacent_positions, separated_positions):
        assert not _targets_reach_the_input(positions, seed, lines=False)
        assert _targets_reach_the_input(lambda rng, n, h, w, chosen=positions: (chosen(rng, n, h, w)[1],) * 2, seed,
                                        lines=False)


@pytest.mark.parametrize(("chosen", "flags", "corrected", "expected"), [
    ("auto", [], False, "adjacent"),
    ("auto", ["correlation"], True, "adjacent"),
    ("auto", ["banding"], True, "adjacent"),
    ("auto", ["banding"], False, "row-column-blind"),
    ("row-column-blind", [], False, "row-column-blind"),
    ("adjacent", ["banding"], False, "adjacent"),
])
def test_the_pairing_is_row_column_blind_when_banding_reaches_the_training_frames(chosen, flags, corrected,
                                                                                  expected):
    assert stack_pairing(chosen, flags, corrected)[0] == expected


def _per_line_positions(rng, count, height, width):
    """The former pairing: diagonal partners with the row drawn per row of cells and the column per column of
    cells (blind to the targets' rows and columns, but unevenly spaced)."""
    row, col = rng.integers(0, 2, (count, height // 2)), rng.integers(0, 2, (count, width // 2))
    rows, cols = 2 * np.arange(height // 2)[None, :], 2 * np.arange(width // 2)[None, :]
    first = (rows + row)[:, :, None] * width + (cols + col)[:, None, :]
    second = (rows + 1 - row)[:, :, None] * width + (cols + 1 - col)[:, None, :]
    return first, second


def _direction_is_readable_from_the_input(positions, seed, size=16):
    """Whether the sampled input's geometry (the spacing of its rows and columns in the frame) varies between
    patches. The target's direction is drawn with it, so a varying geometry is a clue to the direction a network
    can read from the content; a geometry that is the same in every patch is none."""
    first, _ = positions(np.random.default_rng(seed), 64, size, size)
    geometries = {(tuple(np.diff(first[n] // size, axis=0).ravel()), tuple(np.diff(first[n] % size, axis=1).ravel()))
                  for n in range(64)}
    return len(geometries) > 1


@pytest.mark.parametrize("seed", range(3))
def test_the_input_is_a_regular_decimation_that_hides_the_target_direction(seed):
    """Every patch's input rows and columns lie exactly 2 apart, whichever diagonal partner is the target; all
    four directions occur. The former per-row/per-column choice fails this (control): its uneven spacing told the
    network where the target was, and on the conveyor sequence the learned shift put the model below the noisy
    input (docs/benchmarks.md)."""
    assert not _direction_is_readable_from_the_input(separated_positions, seed)
    assert _direction_is_readable_from_the_input(_per_line_positions, seed)
    first, second = separated_positions(np.random.default_rng(seed), 64, 16, 16)
    assert np.all(np.diff(first // 16, axis=1) == 2) and np.all(np.diff(first % 16, axis=2) == 2)
    offsets = {(int(d // 16), int(d % 16)) for d in (second - first + 17)[:, 0, 0]}  # (dy + 1, dx + 1) per patch
    assert offsets == {(0, 0), (0, 2), (2, 0), (2, 2)}  # the four diagonal directions


def test_training_windows_are_k_frames_apart_and_reflect_at_the_ends(tmp_path):
    frames = np.arange(8, dtype=np.uint16)[:, None, None, None] * np.ones((1, 4, 4, 1), np.uint16)
    windows = stack_windows(tmp_path / "s.tif", frames, 3)
    assert len(windows) == 5
    assert [int(v) for v in windows[0]["noisy"][0, 0]] == [1, 0, 1]  # centre 0, reflected
    assert [int(v) for v in windows[0]["noisy_b"][0, 0]] == [2, 3, 4]  # centre 3: frames disjoint from noisy's
    assert [int(v) for v in windows[4]["noisy_b"][0, 0]] == [6, 7, 6]
    with pytest.raises(InputError, match="s.tif: has 3 frame"):
        stack_windows(tmp_path / "s.tif", frames[:3], 3)


@pytest.mark.parametrize("count", [6, 9, 13])
def test_strided_windows_reflect_like_numpy_pad(tmp_path, count):
    # Reference: numpy.pad(mode="reflect") of the frame numbers, every second entry around the centre.
    frames = np.arange(count, dtype=np.uint16)[:, None, None, None] * np.ones((1, 2, 2, 1), np.uint16)
    padded = np.pad(np.arange(count), 4 * count, mode="reflect")
    for index, sample in enumerate(stack_windows(tmp_path / "s.tif", frames, 5, stride=2)):
        wanted = [padded[4 * count + index + 2 * k] for k in range(-2, 3)]
        assert [int(v) for v in sample["noisy"][0, 0]] == wanted


def test_half_size_training_windows_see_the_full_size_motion(tmp_path):
    """A bright dot moving 2 pixels per frame: in the sub-sampled training input the neighbouring frames show it
    displaced by 2 half-size pixels per frame, the displacement the model meets at run time on full-size
    consecutive frames. With consecutive frames (stride 1) the sub-sampling would halve it to 1."""
    count, size, speed = 12, 32, 2
    frames = np.zeros((count, size, size, 1), np.float32)
    for index in range(count):
        frames[index, 12, 4 + speed * index] = 1.0
    config = {"scheme": "auto", "model": {"name": "unet-stack", "hyper": {"frames": 5}},
              "neighbor2neighbor": {"frame_stride": load_config(None)["neighbor2neighbor"]["frame_stride"]}}
    stride = Neighbor2NeighborStack.stride_for(config)
    assert stride == Neighbor2NeighborStack.frame_stride == 2  # the default
    assert Neighbor2NeighborStack.stride_for({**config, "neighbor2neighbor": {"frame_stride": 1}}) == 1  # still
    sample = stack_windows(tmp_path / "s.tif", frames, 5, stride)[5]["noisy"]  # centre frame 5: frames 1, 3 .. 9
    first = (2 * np.arange(size // 2)[:, None]) * size + 2 * np.arange(size // 2)[None, :]  # the input grid, phase 0
    window = torch.from_numpy(np.ascontiguousarray(sample.transpose(2, 0, 1)[None]))
    half = pick(window, torch.from_numpy(first[None].astype(np.int64)))[0].numpy()
    columns = [int(np.argmax(half[k].max(axis=0))) for k in range(5)]
    assert np.diff(columns).tolist() == [speed] * 4


def _trained_output(run, repeated, seed=99, size=48, kind="banding-and-pixel", correlation=0.0, alignment="none"):
    """The trained model's output on a fresh 3-frame pure-noise stack, its neighbours aligned to the centre frame
    as the run time does for ``alignment``; returns the output, the centre frame and the repeated pattern."""
    payload = load_checkpoint(run.last)
    model = model_from_checkpoint(payload)
    normalization = Normalization.from_dict(payload["normalization"])
    stack, fixed = _pure_noise_stack(np.random.default_rng(seed), 3, size, repeated, kind, correlation)
    frames = aligned_frames(stack[..., None].astype(np.float32), np.arange(3), alignment)
    window = np.stack([frame[..., 0] for frame in frames])
    working = torch.from_numpy(normalization.to_working(window[None]))
    with torch.no_grad():
        output = normalization.from_working_float(model(working).numpy())[0, 0]
    return output, stack[1].astype(np.float64), fixed


# (noise, pairing asked for, the pairing the run must use, steps). The row/column-blind pairing for banding repeated
# in every frame; the published adjacent pairing (chosen by `auto` when no banding is flagged) for independent
# noise, a pixel pattern repeated in every frame and noise correlated 0.5 between neighbouring frames.
PURE_NOISE_CASES = {
    "independent": ({"repeated": False}, "auto", "adjacent", 2000),
    "banding-and-pixel-pattern-in-every-frame": ({"repeated": True}, "row-column-blind", "row-column-blind", 3000),
    "pixel-pattern-in-every-frame": ({"repeated": True, "kind": "pixel"}, "adjacent", "adjacent", 2000),
    "correlated-between-frames": ({"repeated": False, "correlation": 0.5}, "adjacent", "adjacent", 3000),
}


# (alignment, noise, pairing, steps): the optical flow on independent noise, and the dominant shifts with banding
# and a pixel pattern repeated in every frame (a correlation surface with a ridge along the rows, where a spurious
# shift could be taken; the row/column-blind pairing, as `auto` takes with banding). On independent noise the
# dominant shifts find no motion at all (tests/test_shift_alignment.py), the windows of the unaligned model.
ALIGNED_PURE_NOISE_CASES = {
    "optical-flow": ("optical-flow", {"repeated": False}, "adjacent", 2000),
    "dominant-shifts-pattern-in-every-frame": ("dominant-shifts", {"repeated": True}, "row-column-blind", 3000),
}


@pytest.mark.slow
@pytest.mark.parametrize("case", list(ALIGNED_PURE_NOISE_CASES))
def test_with_aligned_neighbours_a_model_trained_on_pure_noise_stacks_outputs_the_mean(tmp_path, case):
    """``model.align_neighbours``: the neighbours are moved by a motion estimated from the noisy frames, centre
    frame included, so they may depend (weakly) on the centre frame's noise; the scheme must still give the model
    no reason to copy the centre frame, nor a pattern repeated in every frame. Optical flow on pure independent
    noise, the published adjacent pairing, measured once (2,000 steps): output/input standard deviation 62 / 200,
    correlation with the centre frame 0.13; with the zero-motion test, the flow's median filter and the cubic warp
    added (the alignment now) 45 / 200, -0.09."""
    alignment, noise, pairing, steps = ALIGNED_PURE_NOISE_CASES[case]
    data = _write_stacks(tmp_path / "data", **noise)
    summary, run = train_command(None, str(data), scheme="neighbor2neighbor-stack", steps=steps,
                                 out=str(tmp_path / "run"), announce=lambda message: None,
                                 assignments=TINY + ["optim.lr=0.003", "optim.final_lr_fraction=1.0",
                                                     f'model.align_neighbours="{alignment}"',
                                                     f'neighbor2neighbor.stack_pairing="{pairing}"'])
    assert summary["align_neighbours"] == alignment
    output, centre, fixed = _trained_output(run, alignment=alignment, **noise)
    figures = (f"output mean {output.mean():.0f}, std {output.std():.0f}; input mean {centre.mean():.0f}, "
               f"std {centre.std():.0f}")
    assert abs(output.mean() - centre.mean()) < 0.5 * TEMPORAL, figures
    assert np.std(output) < 0.5 * np.std(centre), figures  # the identity keeps all of it
    assert abs(np.corrcoef(output.ravel(), centre.ravel())[0, 1]) < 0.5, figures
    if noise["repeated"]:  # the pattern repeated in every frame is not reproduced either
        assert abs(np.corrcoef(output.ravel(), np.broadcast_to(fixed, output.shape).ravel())[0, 1]) < 0.5, figures


@pytest.mark.parametrize("earlier", [None, 2])
def test_a_run_aligned_by_an_earlier_revision_is_not_resumed(tmp_path, earlier):
    """Resuming a run whose checkpoint was trained on another revision of the neighbour alignment (1: written before
    revisions were recorded; 2: every neighbour's flow estimated directly) would train on windows aligned two ways:
    refused in one line naming the checkpoint, the run folder left as it was."""
    from grainwright.inference.common.errors import InputError
    from grainwright.inference.images.alignment import ALIGN_REVISIONS
    from grainwright.models.checkpoint import load_checkpoint, save_checkpoint

    data = _write_stacks(tmp_path / "data", repeated=False, count=1, frames=6, size=32)
    summary, run = train_command(None, str(data), scheme="neighbor2neighbor-stack", steps=4,
                                 out=str(tmp_path / "run"), announce=lambda message: None, interrupt_at_step=2,
                                 assignments=TINY + ['model.align_neighbours="optical-flow"'])
    assert summary["stopped"] == "interrupted"
    state = load_checkpoint(run.last)
    assert state["training_summary"]["align_revision"] == ALIGN_REVISIONS["optical-flow"] == 3
    if earlier is None:
        del state["training_summary"]["align_revision"]  # as a checkpoint written before revisions were recorded
    else:
        state["training_summary"]["align_revision"] = earlier
    save_checkpoint(run.last, state)
    before = run.last.read_bytes()
    with pytest.raises(InputError, match=f"revision {earlier or 1} of the optical-flow alignment.*start a new run"
                       ) as error:
        train_command(None, None, resume=str(run.root), announce=lambda message: None)
    assert "last.pt" in str(error.value) and "\n" not in str(error.value)
    assert run.last.read_bytes() == before


@pytest.mark.slow
@pytest.mark.parametrize("case", list(PURE_NOISE_CASES))
def test_a_model_trained_on_pure_noise_stacks_outputs_the_mean(tmp_path, case):
    """Pure noise has nothing to learn but its mean. The model starts as the identity (its skip hands the centre
    frame through), so reaching the mean shows the scheme pushes it away from copying its input, also when noise
    repeats in every frame or is correlated between frames (which plain averaging along the stack would keep).
    Measured once at 4,000 steps with row, column and pixel patterns repeated: output/input standard deviation
    0.13 and correlation with the pattern -0.17 with the row/column-blind pairing, against 0.53 and +0.90 with the
    published adjacent pairing (which is why `auto` takes the blind one when banding is flagged and left)."""
    noise, chosen, used, steps = PURE_NOISE_CASES[case]
    data = _write_stacks(tmp_path / "data", **noise)
    summary, run = train_command(None, str(data), scheme="neighbor2neighbor-stack", steps=steps,
                                 out=str(tmp_path / "run"), assignments=TINY + ["optim.lr=0.003", "optim.final_lr_fraction=1.0",
                                                     f'neighbor2neighbor.stack_pairing="{chosen}"'],
                                 announce=lambda message: None)
    assert summary["stack_pairing"] == used
    output, centre, fixed = _trained_output(run, **noise)
    figures = (f"output mean {output.mean():.0f}, std {output.std():.0f}; input mean {centre.mean():.0f}, "
               f"std {centre.std():.0f}")
    assert abs(output.mean() - centre.mean()) < 0.5 * TEMPORAL, figures
    assert np.std(output) < 0.5 * np.std(centre), figures  # the identity keeps all of it
    if noise.get("correlation"):
        # The share of the centre frame copied into the output (least-squares slope; the identity copies 1). With
        # noise correlated between frames, what is left of the identity the model starts from stays correlated
        # with the centre frame while its amplitude falls (measured, 2,000 -> 4,000 steps: output/input standard
        # deviation 0.31 -> 0.09, correlation 0.61 -> 0.44), so the amplitude is the check here.
        slope = np.cov(output.ravel(), centre.ravel())[0, 1] / np.var(centre)
        assert abs(slope) < 0.2, f"{figures}; slope {slope:.2f}"
    else:
        assert abs(np.corrcoef(output.ravel(), centre.ravel())[0, 1]) < 0.5, figures
    if noise["repeated"]:  # the pattern repeated in every frame is not reproduced either
        assert abs(np.corrcoef(output.ravel(), np.broadcast_to(fixed, output.shape).ravel())[0, 1]) < 0.5, figures


@pytest.mark.slow
def test_noise2noise_across_frames_trains_on_a_folder_of_numbered_frames(tmp_path):
    rng = np.random.default_rng(4)
    folder = tmp_path / "data" / "noisy-stacks" / "burst"
    folder.mkdir(parents=True)
    for index, frame in enumerate(_pure_noise_stack(rng, 8, 32, False)[0]):
        tifffile.imwrite(folder / f"frame_{index:03d}.tif", frame)
    summary, run = train_command(None, str(tmp_path / "data"), scheme="noise2noise-stack", steps=4,
                                 out=str(tmp_path / "run"), assignments=TINY, announce=lambda message: None)
    assert summary["scheme"] == "noise2noise-stack" and summary["stack_frames"] == 3
    assert load_checkpoint(run.best)["architecture"] == "unet-stack"


def test_focus_flags_follow_each_stack_through_its_windows_and_the_split(tmp_path):
    """data.focus_frames names files; a multi-frame model trains on windows cut from them, so every window of a
    matching stack (told apart here by its frame size) is a focus item, whichever side of the split it lands."""
    from grainwright.trainer.run import prepare

    rng = np.random.default_rng(5)
    (tmp_path / "noisy-stacks").mkdir()
    for name, size in (("line1.tif", 48), ("line2.tif", 40), ("line3.tif", 48)):
        tifffile.imwrite(tmp_path / "noisy-stacks" / name, _pure_noise_stack(rng, 10, size, False)[0])
    config = load_config(None, TINY + ['scheme="noise2noise-stack"', f'data.folder="{tmp_path.as_posix()}"',
                                       'data.focus_frames="line2*"', "data.focus_share=0.75", "budget.steps=1"])
    said = []
    setup, _, _ = prepare(config, said.append)
    source = setup.train
    assert source.focus is not None and source.focus.any() and not source.focus.all()
    assert np.array_equal(source.focus, source.heights == 40)
    assert source.image_weights(16)[source.focus].sum() == pytest.approx(0.75)
    assert any("1 file(s) matching 'line2*' get 75% of the training patches" in line for line in said), said


def test_a_gap_in_a_training_folder_of_frames_names_the_file(tmp_path):
    folder = tmp_path / "data" / "noisy-stacks" / "burst"
    folder.mkdir(parents=True)
    for index in (0, 1, 2, 4, 5):
        tifffile.imwrite(folder / f"frame_{index:03d}.tif", np.zeros((32, 32), np.uint16))
    with pytest.raises(InputError, match="frame_004.tif: gap in the frame numbering"):
        train_command(None, str(tmp_path / "data"), steps=1, out=str(tmp_path / "run"), assignments=TINY,
                      announce=lambda message: None)


def test_schemes_and_models_must_agree_on_frames(tmp_path):
    data = _write_stacks(tmp_path / "data", False, count=1, frames=6, size=32)
    with pytest.raises(ConfigError, match="trains single-frame models"):
        train_command(None, str(data), scheme="noise2noise", steps=1, out=str(tmp_path / "a"), assignments=TINY,
                      announce=lambda message: None)
    single = [a for a in TINY if not a.startswith(("model.name", "model.hyper.frames"))]
    with pytest.raises(ConfigError, match="trains multi-frame models"):
        train_command(None, str(data), scheme="noise2noise-stack", steps=1, out=str(tmp_path / "b"),
                      assignments=['model.name="unet-small"'] + single, announce=lambda message: None)


def _axis_stacks(root, axes):
    (root / "noisy-stacks").mkdir(parents=True)
    rng = np.random.default_rng(9)
    for index, axis in enumerate(axes):
        stack = _pure_noise_stack(rng, 6, 32, False)[0]
        if axis == "plain":
            tifffile.imwrite(root / "noisy-stacks" / f"s{index}.tif", stack)
        else:
            tifffile.imwrite(root / "noisy-stacks" / f"s{index}.tif", stack, imagej=True,
                             metadata={"axes": f"{axis}YX"})
    return root


@pytest.mark.parametrize(("axes", "setting", "expected"), [
    (("Z", "Z"), None, "Z"), (("T",), None, "T"), (("Z", "T"), None, "I"), (("plain",), None, "I"),
    (("Z",), "T", "T"),
])
def test_the_exported_model_records_the_training_stacks_axis(tmp_path, capsys, axes, setting, expected):
    """The stack axis comes from the training stacks' ImageJ axes (tifffile writes them, tifffile reads them back
    in the trainer), or from ``data.stack_axis``; the export carries it and ``grainwright info`` shows it."""
    from grainwright.console.cli import main
    from grainwright.models.export import export_checkpoint

    data = _axis_stacks(tmp_path / "data", axes)
    assignments = TINY + ([f'data.stack_axis="{setting}"'] if setting else [])
    summary, run = train_command(None, str(data), steps=1, out=str(tmp_path / "run"), assignments=assignments,
                                 announce=lambda message: None)
    assert summary["stack_axis"] == expected
    export_checkpoint(run.last, tmp_path / "model.onnx", threads=1)
    assert read_model_metadata(tmp_path / "model.onnx")["stack"]["axis"] == expected
    assert main(["info", str(tmp_path / "model.onnx")]) == 0
    assert f"3 frames along {expected}" in capsys.readouterr().out


def test_a_multi_frame_model_inflated_from_a_single_frame_one_computes_the_same():
    """All layers copied, the first layer's weights on the centre frame and zero on the neighbours: the K-frame
    model's output equals the single-frame model's on the centre frame, whatever the neighbours hold."""
    from grainwright.models.registry import build_model

    torch.manual_seed(3)
    single = build_model("unet-small", 1, levels=2, width=8)
    stack = build_model("unet-stack", 1, frames=5, levels=2, width=8)
    stack.load_single_frame(single.state_dict())
    window = torch.rand(2, 5, 32, 32)
    with torch.no_grad():
        assert torch.equal(stack(window), single(window[:, 2:3]))
        window[:, [0, 1, 3, 4]] = torch.rand(2, 4, 32, 32)
        assert torch.equal(stack(window), single(window[:, 2:3]))
    with pytest.raises(ValueError, match="first convolution"):
        build_model("unet-stack", 1, frames=5, levels=2, width=8).load_single_frame(
            build_model("unet-small", 2, levels=2, width=8).state_dict())


@pytest.mark.slow
def test_a_multi_frame_run_starts_from_an_earlier_single_frame_run(tmp_path):
    data = _write_stacks(tmp_path / "data", False, count=2, frames=8, size=32)
    single = [a for a in TINY if not a.startswith(("model.name", "model.hyper.frames"))]
    train_command(None, str(data), scheme="neighbor2neighbor", steps=2, out=str(tmp_path / "single"),
                  assignments=['model.name="unet-small"'] + single, announce=lambda message: None)
    said = []
    summary, run = train_command(None, str(data), steps=2, out=str(tmp_path / "stack"),
                                 assignments=TINY + [f'start.weights="{tmp_path / "single"}"'], announce=said.append)
    assert summary["started_from"]["inflated_from"] == "unet-small"
    assert any("on the centre frame" in line for line in said)
    start = load_checkpoint(run.start)["state_dict"]["encoders.0.0.weight"]
    assert torch.count_nonzero(start[:, [0, 2]]) == 0 and torch.count_nonzero(start[:, 1]) > 0
    wider = [a for a in TINY if not a.startswith("model.hyper.width")] + ["model.hyper.width=8"]
    with pytest.raises(ConfigError, match="start.weights"):
        train_command(None, str(data), steps=1, out=str(tmp_path / "wider"),
                      assignments=wider + [f'start.weights="{tmp_path / "single"}"'], announce=lambda message: None)
