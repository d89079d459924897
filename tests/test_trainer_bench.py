"""The training benchmark's bookkeeping: which targets a set of figures meets, and the report it prints."""
from __future__ import annotations

from grainwright.trainer.bench import TEST_IMAGES, TRAIN_IMAGES, check_targets, render_report

OPPONENT = "opponent (best of TV/NLM/wavelet, tuned on ground truth)"


def _row(value: float) -> dict[str, float]:
    return {name: value for name in TEST_IMAGES}


def _results(supervised: float, n2n: float, best_self: float, ratio: float) -> dict:
    return {
        "settings": {"depth": 8, "width": 32, "patch_size": 40, "batch_size": 16, "minutes_per_scheme": 5.0,
                     "test_images": TEST_IMAGES},
        "cases": {"gaussian": {"label": "Gaussian", "training": {"supervised": {"steps": 100}},
                               "psnr": {"noisy": _row(20.2), OPPONENT: _row(30.0), "supervised": _row(supervised),
                                        "noise2noise": _row(n2n), "masked": _row(best_self - 2.0),
                                        "recorrupted": _row(best_self)}}},
        "throughput": {"ratio": ratio, "threads": 2, "steps": 30, "loop_patches_per_second": [9.5],
                       "bare_patches_per_second": [10.0]},
    }


def test_held_out_images_are_never_trained_on():
    assert not set(TEST_IMAGES) & set(TRAIN_IMAGES)


def test_targets_met():
    results = _results(supervised=30.6, n2n=30.45, best_self=30.2, ratio=0.95)
    targets = check_targets(results)
    assert [met for _, met, _ in targets] == [True, True, True, True]
    assert "recorrupted" in targets[2][0]


def test_targets_missed_by_a_hair():
    results = _results(supervised=30.45, n2n=30.2, best_self=29.9, ratio=0.89)
    assert [met for _, met, _ in check_targets(results)] == [False, False, False, False]


def test_report_lists_every_method_and_target():
    results = _results(supervised=30.6, n2n=30.45, best_self=30.2, ratio=0.95)
    results["targets"] = check_targets(results)
    report = render_report(results)
    for text in ("| supervised | 30.60 | 30.60 | 30.60 | 30.60 | 100 |", OPPONENT, "ratio of medians 95.0%",
                 "| loop >= 90% of bare forward+backward throughput | yes | 95.0% |"):
        assert text in report
