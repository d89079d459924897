"""The report folder on its own: atomic writing, offline page, data files, the quality-versus-speed plot."""
from __future__ import annotations

import csv
import json
import re

import numpy as np
import pytest

from grainwright.inference.common.errors import InputError
from grainwright.inference.evaluation.report import (
    CAUTION,
    Column,
    CropSet,
    ImagePanels,
    ReportContent,
    quality_speed_svg,
    write_report,
)


def _content(methods=("alpha", "beta")) -> ReportContent:
    rng = np.random.default_rng(0)
    noisy = rng.random((40, 50, 1)).astype(np.float32)
    outputs = {m: np.clip(noisy * 0.5 + 0.25, 0, 1) for m in methods}
    crop = CropSet("most detailed region", (0, 0, 16, 16), noisy[:16, :16], None,
                   {m: o[:16, :16] for m, o in outputs.items()})
    panel = ImagePanels("frame 1.png", 0.05, [crop], noisy[:, :, 0],
                        {m: rng.random((40, 50)).astype(np.float32) for m in methods},
                        {m: rng.random((40, 50)) > 0.95 for m in methods})
    ranking = [{"rank": i + 1, "method": m, "psnr": 30.0 - i, "seconds_per_megapixel": 0.1 * (i + 1),
                "note": "<b>escaped</b>", "ratio": float("nan")} for i, m in enumerate(methods)]
    columns = [Column("rank", "rank", 0), Column("method", "method", None), Column("psnr", "PSNR (dB)"),
               Column("note", "note", None), Column("ratio", "ratio")]
    rows = [{"image": "frame 1.png", **row} for row in ranking]
    return ReportContent(
        title="test report", settings={"quick": True}, findings=["alpha is best"],
        ranking_columns=columns, ranking=ranking, row_columns=[Column("image", "image", None), *columns],
        rows=rows, detail_columns=[], details=[], plot_quality_key="psnr", plot_quality_label="PSNR (dB)",
        panels=[panel], notes=["a note"],
    )


def test_report_is_complete_and_offline(tmp_path):
    out = write_report(tmp_path / "report", _content())
    page = (out / "index.html").read_text(encoding="utf-8")
    assert not re.search(r"(?i)https?:", page)
    sources = re.findall(r"""src\s*=\s*['"]([^'"]+)['"]""", page)
    # noisy, two methods, two residuals, two maps
    assert len(sources) == 7
    for source in sources:
        assert (out / source).is_file()
    assert CAUTION in page
    assert "&lt;b&gt;escaped&lt;/b&gt;" in page and "<b>escaped</b>" not in page
    with (out / "results.csv").open(encoding="utf-8") as handle:
        table = list(csv.DictReader(handle))
    assert [row["method"] for row in table] == ["alpha", "beta"]
    document = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert document["ranking"][0]["ratio"] is None  # NaN becomes null, the file stays valid JSON
    assert document["caution"] == CAUTION
    # No staging folders left beside it.
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_existing_report_needs_overwrite_and_is_replaced_whole(tmp_path):
    out = tmp_path / "report"
    out.mkdir()
    (out / "mine.txt").write_text("keep")
    with pytest.raises(InputError, match="--overwrite"):
        write_report(out, _content())
    assert (out / "mine.txt").read_text() == "keep"
    write_report(out, _content(methods=("gamma",)), overwrite=True)
    assert not (out / "mine.txt").exists()
    assert "gamma" in (out / "results.csv").read_text(encoding="utf-8")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_failed_write_leaves_nothing(tmp_path, monkeypatch):
    import grainwright.inference.evaluation.report as report

    def broken(*args, **kwargs):
        raise RuntimeError("disk full")

    monkeypatch.setattr(report, "_html_page", broken)
    with pytest.raises(RuntimeError):
        write_report(tmp_path / "report", _content())
    assert list(tmp_path.iterdir()) == []


def test_quality_speed_plot_places_points():
    svg = quality_speed_svg([("fast", 0.01, 28.0), ("slow", 10.0, 31.0), ("broken", float("nan"), 30.0)], "PSNR")
    assert svg.startswith("<svg") and svg.endswith("</svg>")
    assert svg.count("<circle") == 2  # the point without a time is left out
    cx = [float(v) for v in re.findall(r'<circle cx="([0-9.]+)"', svg)]
    cy = [float(v) for v in re.findall(r'cy="([0-9.]+)"', svg)]
    assert cx[0] < cx[1]  # faster to the left
    assert cy[0] > cy[1]  # better higher up (SVG y grows downwards)
    assert "http" not in svg
