"""Sizing a model to a cycle time: ladder, predictor, picker, frame parsing and the train options.

The MAC counts are checked against the layer structure of DnCNN (Zhang et al. 2017: first conv C -> w, depth-2
hidden w -> w, last w -> C, all 3x3); the tile counts against the runtime's own tile plan.
"""
from __future__ import annotations

import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.runtime.machine_profile import PROFILE_FORMAT
from grainwright.inference.runtime.tiling import default_tile, plan_tiles, tile_margin
from grainwright.trainer import sizing

PROFILE = {"format": PROFILE_FORMAT, "version": 1, "threads": 2,
           "seconds_per_gmac": {"fp32": {"16": 0.2, "32": 0.12, "48": 0.09, "64": 0.08},
                                "int8": {"16": 0.2, "64": 0.04}},
           "runtime_overhead": {"seconds_per_megapixel": 0.3, "seconds_per_frame": 0.05}}
FRAME = (1024, 768)


@pytest.fixture(scope="module")
def rungs():
    return sizing.ladder()


def test_ladder_is_ordered_and_counts_macs_like_dncnn(rungs):
    macs = [item.macs_per_pixel for item in rungs]
    assert macs == sorted(macs) and len(set(macs)) == len(macs)
    for item in rungs:
        depth, width = item.hyper["depth"], item.hyper["width"]
        assert item.macs_per_pixel == 9 * (width + (depth - 2) * width**2 + width)
        assert item.receptive_field == 2 * depth + 1
        assert item.architecture == "residual"


def test_prediction_follows_the_formula_and_the_tile_plan(rungs):
    item = next(r for r in rungs if r.label == "residual 10x48")
    margin = tile_margin(item.receptive_field)
    computed = plan_tiles(768, 1024, tile=default_tile(margin), margin=margin).computed_pixels
    prediction = sizing.predict(item, PROFILE, FRAME)
    assert prediction.computed_pixels == computed >= 1024 * 768
    assert prediction.network_seconds == pytest.approx(item.macs_per_pixel * computed / 1e9 * 0.09)
    assert prediction.runtime_seconds == pytest.approx(0.05 + 0.3 * 1024 * 768 / 1e6)
    four = sizing.predict(item, PROFILE, FRAME, ensemble=4)
    assert four.network_seconds == pytest.approx(4 * prediction.network_seconds)
    assert sizing.predict(item, PROFILE, FRAME, precision="int8").network_seconds < prediction.network_seconds


@settings(max_examples=40, deadline=None)
@given(st.floats(min_value=1.0, max_value=1e6), st.floats(min_value=1.0, max_value=1e6))
def test_pick_is_monotone_in_the_target(low, high):
    rungs = sizing.ladder()
    low, high = sorted((low, high))
    picks = []
    for target in (low, high):
        try:
            chosen, _ = sizing.pick(PROFILE, target, FRAME, rungs=rungs)
            picks.append(rungs.index(chosen.rung))
        except ConfigError:
            picks.append(-1)
    assert picks[0] <= picks[1]
    if picks[1] >= 0:
        chosen, predictions = sizing.pick(PROFILE, high, FRAME, rungs=rungs)
        assert chosen.milliseconds <= high
        assert all(p.milliseconds > high for p in predictions[rungs.index(chosen.rung) + 1:])


def test_pick_refuses_a_target_below_the_smallest_rung(rungs):
    smallest = sizing.predict(rungs[0], PROFILE, FRAME).milliseconds
    with pytest.raises(ConfigError, match=r"smallest size, residual 5x16, is predicted at \d+ ms per 1024x768"):
        sizing.pick(PROFILE, smallest * 0.9, FRAME, rungs=rungs)
    chosen, _ = sizing.pick(PROFILE, smallest * 1.01, FRAME, rungs=rungs)
    assert chosen.rung == rungs[0]
    with pytest.raises(ConfigError, match="positive"):
        sizing.pick(PROFILE, 0, FRAME, rungs=rungs)


@pytest.mark.parametrize("text, expected", [("1024x768", (1024, 768)), (" 64X32 ", (64, 32)), ("1x1", (1, 1))])
def test_parse_frame(text, expected):
    assert sizing.parse_frame(text) == expected


@pytest.mark.parametrize("text", ["1024", "1024x", "x768", "0x10", "10x0", "-5x10", "1024*768", "ax b", ""])
def test_parse_frame_rejects(text):
    with pytest.raises(ConfigError, match="--frame"):
        sizing.parse_frame(text)


def test_fit_assignments_pick_and_build_the_rung(tmp_path, rungs):
    from grainwright.models.registry import build_model
    from grainwright.trainer.config import load_config

    path = tmp_path / "plant.json"
    path.write_text(json.dumps(PROFILE))
    target = sizing.predict(rungs[4], PROFILE, FRAME).milliseconds * 1.001
    said = []
    assignments = sizing.fit_assignments(str(path), target, "1024x768", announce=said.append)
    assert any("picked residual 10x48" in line and "predicted" in line for line in said)
    config = load_config(None, assignments)
    assert config["model"]["name"] == "residual" and config["model"]["hyper"] == {"depth": 10, "width": 48}
    # The ladder has no starting model: the fitted size says so and trains from random weights.
    assert config["start"]["weights"] == "random" and any("from random weights" in line for line in said)
    assert build_model("residual", 1, **config["model"]["hyper"]).macs_per_pixel() == rungs[4].macs_per_pixel


def test_fit_assignments_name_a_bad_profile(tmp_path):
    path = tmp_path / "broken-profile.json"
    path.write_text("[1, 2")
    with pytest.raises(InputError, match="broken-profile.json"):
        sizing.fit_assignments(str(path), 100.0, "64x64")


def _noisy_data(root):
    import numpy as np
    from skimage import data

    from grainwright.inference.images.imageio import write_image

    rng = np.random.default_rng(0)
    for index, (top, left) in enumerate(((0, 0), (100, 300), (300, 100), (250, 250))):
        clean = data.camera()[top:top + 64, left:left + 64] / 255.0  # scikit-image sample image, open data
        noisy = (clean + rng.normal(0, 0.1, clean.shape)).astype(np.float32)[..., None]
        write_image(root / "noisy" / f"{index}.npy", noisy)
    return root


@pytest.mark.slow
def test_train_fits_the_model_to_a_profile(tmp_path, capsys, rungs):
    import tomllib

    from grainwright.console.cli import main

    profile = tmp_path / "plant.json"
    profile.write_text(json.dumps(PROFILE))
    target = sizing.predict(rungs[2], PROFILE, (640, 480)).milliseconds * 1.001
    code = main(["train", "--data", str(_noisy_data(tmp_path / "data")), "--steps", "2", "--out",
                 str(tmp_path / "run"), "--fit-to", str(profile), "--ms-per-frame", f"{target:.1f}", "--frame",
                 "640x480", "--set", "logging.progress=false", "--set", "logging.tensorboard=false",
                 "--set", "data.patch_size=32", "--set", "data.batch_size=2", "--set", "threads=1"])
    said = capsys.readouterr().out
    assert code == 0
    assert "picked residual 8x32, predicted" in said
    config = tomllib.loads((tmp_path / "run" / "config.toml").read_text())
    assert config["model"]["name"] == "residual"
    assert config["model"]["hyper"]["depth"] == 8 and config["model"]["hyper"]["width"] == 32


@pytest.mark.parametrize("extra, problem", [
    (["--ms-per-frame", "100"], "--frame"),
    (["--fit-to", "plant.json", "--frame", "64x64"], "--ms-per-frame"),
    (["--fit-to", "missing.json", "--ms-per-frame", "100", "--frame", "64x64"], "missing.json"),
    (["--fit-to", "plant.json", "--ms-per-frame", "0.001", "--frame", "64x64"], "smallest size"),
    (["--fit-to", "plant.json", "--ms-per-frame", "100", "--frame", "64by64"], "--frame"),
])
def test_train_fit_options_refuse_bad_input(tmp_path, capsys, monkeypatch, extra, problem):
    from grainwright.console.cli import main

    (tmp_path / "plant.json").write_text(json.dumps(PROFILE))
    monkeypatch.chdir(tmp_path)
    code = main(["train", "--data", str(tmp_path), "--out", str(tmp_path / "run")] + extra)
    assert code == 2
    assert problem in capsys.readouterr().err
    assert not (tmp_path / "run").exists()
