"""``grainwright bench runtime`` on a tiny model and image: the front end delegates to grainwright.benchmarks.runtime,
every section of figures is there, the JSON is written, and the peak-memory run launches ``denoise`` in a fresh
process (its peak RSS is the operating system's figure from ``wait4``, so only its presence and sign are checked)."""
from __future__ import annotations

import json

from test_runner import build_conv_model

from grainwright.console.cli import main


def test_runtime_bench_measures_every_section(tmp_path, capsys):
    model = build_conv_model(tmp_path / "tiny.onnx")
    out = tmp_path / "figures.json"
    code = main(["bench", "runtime", str(model), "--size", "256", "--tiles", "128", "--repeat", "1",
                 "--rss-megapixels", "1", "--threads", "1", "--json", str(out)])
    assert code == 0
    printed = capsys.readouterr().out
    assert "file-to-file path by kept-tile edge" in printed and "peak RSS" in printed
    figures = json.loads(out.read_text())
    assert figures["throughput"]["fp32 file/bare"] > 0
    assert list(figures["tile_sweep"]) == ["128"]
    assert set(figures["seconds_per_1mp_frame"]) == {"fp32 1 thread(s)", "fp32 2 thread(s)"}
    [peak] = figures["peak_rss"]
    assert peak["edge"] == 1024 and peak["peak_rss_mib"] > 0
    assert "grainwright.console denoise" in peak["command"]
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary left beside the JSON
