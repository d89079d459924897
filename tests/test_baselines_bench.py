"""``grainwright bench baselines`` on a tiny setting: it runs, labels tuned figures, and writes its JSON atomically."""
from __future__ import annotations

import argparse
import json

import pytest

from grainwright.benchmarks import baselines as bench_baselines_logic
from grainwright.console.commands import bench_baselines
from grainwright.inference.common.errors import ConfigError
from grainwright.inference.evaluation.calibration import GROUND_TRUTH_LABEL


def _args(*argv: str) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    bench_baselines.add_arguments(parser)
    return parser.parse_args(list(argv))


def test_bench_reports_every_method_with_labelled_tuning(tmp_path, capsys):
    out = tmp_path / "figures.json"
    args = _args("--images", "camera,astronaut", "--size", "40", "--methods", "mean,tv,bm3d", "--quick",
                 "--json", str(out))
    assert bench_baselines.run(args) == 0
    printed = capsys.readouterr().out
    assert GROUND_TRUTH_LABEL in printed and "s/MP" in printed
    figures = json.loads(out.read_text())
    methods = [row["method"] for row in figures["summary"]]
    assert methods == ["mean", "tv", "bm3d", bench_baselines_logic.HARD_STAGE_ROW]
    assert figures["tuned_label"] == GROUND_TRUTH_LABEL
    for row in figures["summary"]:
        assert row["seconds_per_megapixel"] > 0
        if row["tuned_psnr"] is not None:
            # The defaults are among the points tried, so tuning never loses to them.
            assert row["tuned_psnr"] >= row["default_psnr"] - 1e-6
    assert [p.name for p in tmp_path.iterdir()] == ["figures.json"]  # no temporary file left behind


def test_bench_refuses_unknown_names():
    with pytest.raises(ConfigError, match="unknown baseline"):
        bench_baselines.run(_args("--methods", "bm4d", "--size", "32"))
    with pytest.raises(ConfigError, match="unknown sample image"):
        bench_baselines.run(_args("--images", "portrait", "--methods", "mean", "--size", "32"))
