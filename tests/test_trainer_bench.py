"""The training benchmark's bookkeeping: which targets a set of figures meets, and the report it prints."""
from __future__ import annotations

import argparse
import json

import numpy as np
import pytest

from grainwright.benchmarks.training import (
    ENSEMBLE_LABEL,
    OPPONENT,
    TEST_IMAGES,
    TRAIN_IMAGES,
    case_schemes,
    check_targets,
    render_report,
    run_bench,
)
from grainwright.inference.common.errors import ConfigError


def _row(value: float) -> dict[str, float]:
    return {name: value for name in TEST_IMAGES}


def _results(supervised: float, n2n: float, best_self: float, ratio: float, ensemble_gain: float = 0.0) -> dict:
    psnr = {"noisy": _row(20.2), OPPONENT: _row(30.0)}
    for name, value in (("supervised", supervised), ("noise2noise", n2n), ("masked", best_self - 2.0),
                        ("recorrupted", best_self)):
        psnr[name] = _row(value)
        if ensemble_gain:
            psnr[name + ENSEMBLE_LABEL] = _row(value + ensemble_gain)
    return {
        "settings": {"config": "noisy-only", "set": [], "model": "unet-small", "hyper": {"levels": 2, "width": 24},
                     "patch_size": 48, "batch_size": 16, "test_images": TEST_IMAGES},
        "cases": {"gaussian": {"label": "Gaussian", "training": {"supervised": {"steps": 100, "minutes": 10.0}},
                               "psnr": psnr}},
        "throughput": {"ratio": ratio, "threads": 2, "steps": 30, "loop_patches_per_second": [9.5],
                       "bare_patches_per_second": [10.0]},
    }


def test_held_out_images_are_never_trained_on():
    assert not set(TEST_IMAGES) & set(TRAIN_IMAGES)


def test_half_scale_copies_are_2x2_means_of_the_larger_training_images():
    from grainwright.benchmarks.training import (
        HALF_SCALE_MIN_EDGE,
        sample_image,
        training_image,
        training_labels,
    )

    labels = training_labels(half_scale=True)
    assert labels[: len(TRAIN_IMAGES)] == list(TRAIN_IMAGES) == training_labels()
    halves = labels[len(TRAIN_IMAGES):]
    assert "brick@half" in halves and "text@half" not in halves  # 512 x 512 has one; 172 x 448 is too small
    full, half = sample_image("brick", 1024), training_image("brick@half")
    assert min(full.shape) >= HALF_SCALE_MIN_EDGE and half.shape == (256, 256)
    # Area downsampling by two: each output pixel is the mean of its 2x2 cell (computed here by slicing).
    expected = (full[0::2, 0::2] + full[1::2, 0::2] + full[0::2, 1::2] + full[1::2, 1::2]) / 4
    np.testing.assert_allclose(half, expected, atol=1e-6)


def test_targets_met():
    results = _results(supervised=30.6, n2n=30.45, best_self=30.2, ratio=0.95)
    targets = check_targets(results)
    assert [met for _, met, _ in targets] == [True, True, True, True]
    assert "recorrupted" in targets[2][0]


def test_targets_missed_by_a_hair():
    results = _results(supervised=30.45, n2n=30.2, best_self=29.9, ratio=0.89)
    assert [met for _, met, _ in check_targets(results)] == [False, False, False, False]


def test_ensemble_rows_are_judged_separately():
    results = _results(supervised=30.3, n2n=30.2, best_self=29.9, ratio=0.95, ensemble_gain=0.25)
    targets = {description: met for description, met, _ in check_targets(results)}
    assert targets["supervised >= opponent + 0.5 dB"] is False
    assert targets[f"supervised{ENSEMBLE_LABEL} >= opponent + 0.5 dB"] is True


def test_report_lists_every_method_and_target():
    results = _results(supervised=30.6, n2n=30.45, best_self=30.2, ratio=0.95)
    results["targets"] = check_targets(results)
    report = render_report(results)
    for text in ("| supervised | 30.60 | 30.60 | 30.60 | 30.60 | 10.0 | 100 |", OPPONENT, "ratio of medians 95.0%",
                 "| loop >= 90% of bare forward+backward throughput | yes | 95.0% |", "unet-small (levels 2, width 24)"):
        assert text in report


def test_results_of_other_settings_are_not_mixed(tmp_path):
    saved = tmp_path / "bench.json"
    saved.write_text(json.dumps({"settings": {"config": "pairs"}, "cases": {}}))
    args = argparse.Namespace(work=str(tmp_path / "work"), cases="gaussian", schemes="supervised", json=str(saved),
                              config="noisy-only", set=None, seed=0, threads=1, minutes_per_scheme=0.1,
                              throughput=False, half_scale=False)
    with pytest.raises(ConfigError, match="other settings .differing: .*config"):
        run_bench(args)
    assert not (tmp_path / "work").exists()


@pytest.mark.slow
def test_a_tiny_benchmark_runs_end_to_end_and_resumes(tmp_path, monkeypatch):
    from grainwright.benchmarks import training as bench

    # Small crops of the same open sample images, one cheap baseline: the plumbing, not the figures.
    original = bench.sample_image
    monkeypatch.setattr(bench, "sample_image", lambda name, edge=96: original(name)[:96, :96].copy())
    monkeypatch.setattr(bench, "TRAIN_IMAGES", ("brick", "grass", "gravel"))
    monkeypatch.setattr(bench, "SEARCH_BASELINES", ("tv",))
    saved = tmp_path / "bench.json"
    args = argparse.Namespace(work=str(tmp_path / "work"), cases="gaussian", schemes="supervised", json=str(saved),
                              config="noisy-only", set=["model.hyper.width=8", "data.batch_size=4",
                                                        "logging.tensorboard=false"],
                              seed=0, threads=1, minutes_per_scheme=0.05, throughput=False, half_scale=False)
    assert run_bench(args) == 0
    results = json.loads(saved.read_text())
    rows = results["cases"]["gaussian"]["psnr"]
    assert set(rows) == {"noisy", OPPONENT, "TV (tuned on ground truth)", "supervised", "supervised" + ENSEMBLE_LABEL}
    # PSNR of sigma 25/255 noise is about 20.2 dB (definition of PSNR); the tuned TV filter must improve on it.
    assert all(rows[OPPONENT][name] > rows["noisy"][name] + 3 for name in TEST_IMAGES)
    assert results["cases"]["gaussian"]["training"]["supervised"]["steps"] > 0
    first = rows["supervised"]
    args.schemes = "supervised,recorrupted"
    args.minutes_per_scheme = 0.03
    assert run_bench(args) == 0  # supervised is kept, recorrupted added
    rows = json.loads(saved.read_text())["cases"]["gaussian"]["psnr"]
    assert rows["supervised"] == first and "recorrupted" + ENSEMBLE_LABEL in rows


def _tiny_recorrupted_bench(tmp_path, monkeypatch, train_images: tuple[str, ...], steps: int, **options):
    """Run ``bench train``'s Gaussian case with ``recorrupted`` on 96-pixel crops for ``steps`` steps, TV as the
    only opponent; returns the benchmark module (patched) and the results file."""
    from grainwright.benchmarks import training as bench

    original = bench.sample_image
    monkeypatch.setattr(bench, "sample_image", lambda name, edge=96: original(name)[:96, :96].copy())
    monkeypatch.setattr(bench, "TRAIN_IMAGES", train_images)
    monkeypatch.setattr(bench, "SEARCH_BASELINES", ("tv",))
    saved = tmp_path / "bench.json"
    args = argparse.Namespace(work=str(tmp_path / "work"), cases="gaussian", schemes="recorrupted", json=str(saved),
                              config="noisy-only", set=["data.batch_size=4", "logging.tensorboard=false",
                                                        'model.precision="float32"'],
                              seed=0, threads=1, minutes_per_scheme=10.0, steps_per_scheme=steps, throughput=False,
                              half_scale=False, **options)
    assert run_bench(args) == 0
    return bench, saved


@pytest.mark.slow
def test_a_fine_tuned_scheme_gets_a_row_for_its_start_alone_at_a_fixed_step_count(tmp_path, monkeypatch):
    bench, saved = _tiny_recorrupted_bench(tmp_path, monkeypatch, ("brick", "grass", "gravel"), steps=6)
    results = json.loads(saved.read_text())
    rows, training = results["cases"]["gaussian"]["psnr"], results["cases"]["gaussian"]["training"]["recorrupted"]
    assert training["steps"] == 6 and training["started_from"]["weights"] == "starting-model"
    assert training["selection"]["kept"] in ("fine-tuned", "start")
    start = bench.starting_label("recorrupted")
    assert {start, start + ENSEMBLE_LABEL} <= set(rows)
    # The selection keeps the better end by MC-SURE on held-out training frames; on the test images the fine-tuned
    # row may differ from the start only when the fine-tuned state was kept.
    if training["selection"]["kept"] == "start":
        assert rows["recorrupted"] == rows[start]
    assert any(description.startswith("gaussian: fine-tuned recorrupted >= its start alone")
               for description, _, _ in results["targets"])


def test_a_misspelt_model_setting_stops_before_any_work(tmp_path):
    args = argparse.Namespace(work=str(tmp_path / "work"), cases="gaussian", schemes="supervised",
                              json=str(tmp_path / "bench.json"), config="noisy-only",
                              set=["model.hyper.widht=8"], seed=0, threads=1, minutes_per_scheme=0.1,
                              throughput=False, half_scale=False)
    with pytest.raises(ConfigError, match="did you mean 'width'"):
        run_bench(args)
    assert not (tmp_path / "work").exists() and not (tmp_path / "bench.json").exists()


@pytest.mark.slow
def test_throughput_measurement_reports_whole_run_and_step_rates(tmp_path, monkeypatch):
    from grainwright.benchmarks import training as bench

    original = bench.sample_image
    monkeypatch.setattr(bench, "sample_image", lambda name, edge=96: original(name)[:96, :96].copy())
    monkeypatch.setattr(bench, "TRAIN_IMAGES", ("brick", "grass", "gravel"))
    folders = bench.make_folders(tmp_path, "gaussian", seed=0)
    args = argparse.Namespace(config="noisy-only", set=["model.hyper.width=8", "data.batch_size=4"], seed=0,
                              threads=1)
    result = bench.measure_throughput(folders["root"] / "clean-only", tmp_path, args, steps=15, rounds=2)
    assert len(result["loop_patches_per_second"]) == len(result["bare_patches_per_second"]) == 2
    # The steps alone leave out the run's one-off costs (checkpoints, final validation), so they are faster.
    for whole, steps in zip(result["loop_patches_per_second"], result["loop_step_patches_per_second"]):
        assert 0 < whole < steps
    assert result["step_ratio"] > result["ratio"] > 0


def test_speckle_case_leaves_the_scheme_to_the_config_and_is_judged_against_tv_nlm_wavelet():
    from grainwright.benchmarks.training import AS_CONFIGURED, CASES, case_baselines, opponent_label

    assert CASES["speckle-4"]["noise"] == {"kind": "speckle-gamma", "looks": 4.0}
    assert CASES["speckle-4"]["schemes"] == (AS_CONFIGURED,) and case_baselines("speckle-4") == ("tv", "nlm", "wavelet")
    label = opponent_label("speckle-4")
    assert label == "opponent (best of TV/NLM/wavelet, tuned on ground truth)" and opponent_label("gaussian") == OPPONENT
    results = _results(supervised=30.6, n2n=30.45, best_self=30.2, ratio=0.95)
    results["cases"]["speckle-4"] = {"label": "speckle", "training": {},
                                     "psnr": {label: _row(27.0), AS_CONFIGURED: _row(26.6),
                                              AS_CONFIGURED + ENSEMBLE_LABEL: _row(26.4)}}
    targets = {description: (met, figure) for description, met, figure in check_targets(results)}
    assert targets[f"speckle, 4 looks, {AS_CONFIGURED}: within 0.5 dB of the per-image best of TV/NLM/wavelet tuned "
                   "on ground truth"] == (True, "-0.40 dB")
    assert targets[f"speckle, 4 looks, {AS_CONFIGURED}{ENSEMBLE_LABEL}: within 0.5 dB of the per-image best of "
                   "TV/NLM/wavelet tuned on ground truth"] == (False, "-0.60 dB")


def test_only_schemes_keeps_each_cases_own_order_and_may_leave_none():
    gaussian = ("supervised", "recorrupted", "neighbor2neighbor")
    assert case_schemes("gaussian", gaussian) == gaussian
    assert case_schemes("poisson-gaussian", gaussian) == ("supervised", "recorrupted")
    assert case_schemes("poisson-gaussian", gaussian, "neighbor2neighbor, recorrupted") == ("recorrupted",)
    assert case_schemes("speckle", gaussian, "recorrupted,neighbor2neighbor") == ("neighbor2neighbor",)
    assert case_schemes("speckle", gaussian, "sure") == ()
    with pytest.raises(ConfigError, match="unknown scheme"):
        case_schemes("speckle", gaussian, "recorupted")


def test_a_misspelt_case_or_scheme_is_refused_before_any_work(tmp_path):
    parser = argparse.ArgumentParser()
    from grainwright.console.commands.bench_train import add_arguments
    add_arguments(parser)
    for argv, message in ((["--cases", "gausian"], "unknown case"), (["--only-schemes", "recorupted"], "unknown scheme")):
        args = parser.parse_args(argv + ["--work", str(tmp_path / "work")])
        with pytest.raises(ConfigError, match=message):
            run_bench(args)
        assert not (tmp_path / "work").exists()


def test_training_on_the_scored_images_uses_their_noisy_arrays_only_and_a_strip_of_each(tmp_path, monkeypatch):
    from grainwright.inference.images.imageio import read_image

    bench, saved = _tiny_recorrupted_bench(tmp_path, monkeypatch, ("brick", "grass"), steps=4, train_on_scored=True)
    results = json.loads(saved.read_text())
    assert results["settings"]["train_on_scored"] is True
    made = bench.make_folders(tmp_path / "again", "gaussian", 0, ["brick", "grass"])  # the same noise, seeded
    folder = tmp_path / "work" / "gaussian" / "noisy-only" / "noisy"
    assert sorted(path.name for path in folder.iterdir()) == [f"scored-{name}.npy" for name in sorted(TEST_IMAGES)]
    for name in TEST_IMAGES:
        np.testing.assert_array_equal(read_image(folder / f"scored-{name}.npy")[..., 0], made["noisy"][name])
    training = results["cases"]["gaussian"]["training"]["recorrupted"]
    assert training["steps"] == 4 and training["selection"]["frames"] == len(TEST_IMAGES)
    config = (tmp_path / "work" / "runs" / "gaussian-recorrupted" / "config.toml").read_text()
    assert 'validation_split = "regions"' in config


def test_training_on_the_scored_images_refuses_schemes_that_need_clean_images_or_pairs(tmp_path):
    args = argparse.Namespace(work=str(tmp_path / "work"), cases="gaussian", schemes="supervised,recorrupted",
                              json=str(tmp_path / "bench.json"), config="noisy-only", set=[], seed=0, threads=1,
                              minutes_per_scheme=0.1, throughput=False, half_scale=False, train_on_scored=True)
    with pytest.raises(ConfigError, match="--train-on-scored: supervised"):
        run_bench(args)
    assert not (tmp_path / "work").exists()
