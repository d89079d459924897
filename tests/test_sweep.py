"""The recorded quality search: trial composition, the self-ensemble scoring against the runtime's own ensemble,
and the table that records every trial.

The ensemble members must be the runtime's (``grainwright.inference.runtime.runner``): the scores of the search are only
worth something if ``grainwright denoise --ensemble N`` reproduces them.
"""
from __future__ import annotations

import numpy as np
import pytest

from grainwright.benchmarks import size_search as sweep
from grainwright.benchmarks.training import ensemble_member
from grainwright.inference.runtime.runner import (
    ENSEMBLE_TRANSFORMS,
    _transform,
    _untransform,
)


def test_trials_are_base_plus_changes():
    trials = sweep.architecture_trials()
    assert [t["name"] for t in trials] == list(sweep.ARCHITECTURES)
    reference = next(t for t in trials if t["name"] == "residual 10x48")
    assert reference["hyper"] == sweep.BASE["hyper"] and reference["scheme"] == "recorrupted"
    unet = next(t for t in trials if t["model"] == "unet-small")
    assert set(unet["hyper"]) == {"levels", "width"} and unet["patch_size"] == sweep.BASE["patch_size"]
    regimes = sweep.regime_trials(unet)
    assert all(t["model"] == "unet-small" and t["hyper"] == unet["hyper"] for t in regimes)
    assert {(t["patch_size"], t["batch_size"]) for t in regimes} >= {(64, 8), (32, 32)}
    small = next(t for t in trials if t["name"] == "residual 8x32")
    noise = sweep.noise_trials(small)
    assert {t["case"] for t in noise} == {"poisson-gaussian", "speckle"}
    assert all(t["hyper"] == small["hyper"] and t["name"].endswith("residual 8x32") for t in noise)
    noisemap = next(t for t in noise if t["model"] == "residual-noisemap")
    assert noisemap["set"]["data.transform"] == "none" and noisemap["case"] == "poisson-gaussian"


@pytest.mark.parametrize("member", ENSEMBLE_TRANSFORMS)
def test_members_are_the_runtime_members(member):
    image = np.random.default_rng(0).random((6, 6, 2)).astype(np.float32)
    ours = ensemble_member(image, member)
    runtime = _transform(image.transpose(2, 0, 1)[None], member)[0].transpose(1, 2, 0)
    np.testing.assert_array_equal(ours, runtime)
    np.testing.assert_array_equal(ensemble_member(ours, member, inverse=True), image)
    back = _untransform(runtime.transpose(2, 0, 1)[None], member)[0].transpose(1, 2, 0)
    np.testing.assert_array_equal(back, image)


def test_ensemble_scores_match_the_runtime_ensemble(tmp_path):
    pytest.importorskip("torch")
    import onnx
    import torch

    from grainwright.inference.evaluation.metrics import psnr
    from grainwright.inference.images.normalization import Normalization
    from grainwright.inference.runtime.runner import ModelSpec, OnnxDenoiser
    from grainwright.models.export import export_graph
    from grainwright.models.registry import build_model

    torch.manual_seed(0)
    model = build_model("residual", 1, depth=3, width=4)
    rng = np.random.default_rng(1)
    clean = rng.random((24, 24, 1)).astype(np.float32) * 0.5 + 0.25
    noisy = clean + rng.normal(0, 0.1, clean.shape).astype(np.float32)
    path = tmp_path / "tiny.onnx"
    onnx.save(export_graph(model, Normalization.for_array(noisy)), str(path))
    spec = ModelSpec(receptive_field=model.receptive_field)
    scores = sweep.ensemble_scores(OnnxDenoiser(path, threads=1, spec=spec), {"crop": (clean, noisy)})
    for size in sweep.ENSEMBLES:
        reference = OnnxDenoiser(path, threads=1, spec=spec, ensemble=size).run(noisy, as_float=True)
        assert scores["psnr"][str(size)]["crop"] == pytest.approx(psnr(clean, reference, peak=1.0), abs=1e-4)
    assert scores["seconds"]["8"] >= scores["seconds"]["1"] > 0


def test_table_records_every_trial_including_losers():
    def record(name, stage, case, means):
        return {"spec": {"name": name, "case": case}, "stage": stage, "macs_per_pixel": 1000.0, "steps": 10,
                "train_cpu_seconds": 5.0, "mean": means}

    opponents = {case: {**{m: {"psnr": {"a": 30.0}} for m in sweep.SEARCH_BASELINES},
                        "best per image": {"psnr": {"a": 30.0}}} for case in ("gaussian", "speckle")}
    results = {"opponents": opponents, "trials": {
        "winner": record("winner", "architecture", "gaussian", {"1": 30.2, "2": 30.3, "4": 30.4, "8": 30.5}),
        "loser": record("loser", "architecture", "gaussian", {"1": 29.0}),
        "speckle run": record("speckle run", "noise", "speckle", {"1": 28.0}),
    }}
    table = sweep.render_markdown(results)
    rows = [line for line in table.splitlines() if line.startswith("| ") and "Trial" not in line]
    assert len(rows) == 3
    assert "| loser | gaussian |" in table and "-1.00 |" in table  # the loser and its gap, x1 only
    assert "+0.50 |" in table  # the winner's gap with 8 members
