"""``grainwright bench cluster`` on a tiny model and batch: every contender runs, start-up is reported apart, the
ratios are computed from the recorded times, and the JSON is written."""
from __future__ import annotations

import json
import statistics

import pytest
from test_runner import build_conv_model

from grainwright.console.cli import main


@pytest.mark.slow  # starts two local clusters
def test_cluster_bench_runs_every_contender(tmp_path, capsys):
    model = build_conv_model(tmp_path / "tiny.onnx")
    out = tmp_path / "figures.json"
    code = main(["bench", "cluster", str(model), "--frames", "4", "--size", "64", "--cores", "2",
                 "--overhead-files", "4", "--json", str(out)])
    assert code == 0
    assert "cluster of one against the local path" in capsys.readouterr().out
    figures = json.loads(out.read_text())
    layouts = ["cluster 1 worker x 2 threads", "cluster 2 workers x 1 thread"]
    assert set(figures["startup_seconds"]) == set(layouts)
    assert set(figures["median_seconds"]) == {"local", *layouts, "tiny local", f"tiny {layouts[0]}"}
    median = {label: statistics.median(values) for label, values in figures["raw_seconds"].items()}
    assert figures["cluster_of_one_overhead"] == pytest.approx(median[layouts[0]] / median["local"] - 1)
    assert figures["megapixels"] == pytest.approx(4 * 64 * 64 / 1e6)
