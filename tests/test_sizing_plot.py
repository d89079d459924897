"""The quality-versus-time plot of the sizes tried (SVG, torch-free); parsed with the standard library's XML
parser as the reference for well-formed SVG."""
from __future__ import annotations

import xml.etree.ElementTree as ElementTree

from grainwright.benchmarks.size_plot import (
    points_from_sweep,
    predicted_ms,
    size_plot_svg,
    write_size_plot,
)
from grainwright.inference.runtime.machine_profile import PROFILE_FORMAT

SVG = "{http://www.w3.org/2000/svg}"
PROFILE = {"format": PROFILE_FORMAT, "version": 1, "threads": 2, "seconds_per_gmac": {"fp32": {"16": 0.2, "64": 0.1}},
           "runtime_overhead": {"seconds_per_megapixel": 0.5, "seconds_per_frame": 0.1}}


def test_plot_marks_the_chosen_size_and_the_target(tmp_path):
    points = [("small", 50.0, 29.0), ("middle", 400.0, 30.0), ("large <b>", 3000.0, 30.3), ("broken", float("nan"), 1)]
    svg = size_plot_svg(points, chosen="middle", target_ms=500.0)
    root = ElementTree.fromstring(svg)
    texts = [element.text for element in root.iter(f"{SVG}text")]
    assert "middle (chosen)" in texts and "small" in texts and "large <b>" in texts  # escaped, then parsed back
    assert not any(text and "broken" in text for text in texts)
    assert len(root.findall(f"{SVG}circle")) == 3 + 1  # three dots and the ring around the chosen one
    assert "target 500 ms" in texts
    dots = {round(float(c.get("cx"))): float(c.get("cy")) for c in root.findall(f"{SVG}circle")}
    assert len(dots) == 3
    xs = sorted(dots)
    assert dots[xs[0]] > dots[xs[1]] > dots[xs[2]]  # faster to the left, better PSNR higher up (SVG y grows down)
    path = write_size_plot(tmp_path / "plot" / "sizes.svg", svg)
    assert path.read_text() == svg and not list(path.parent.glob(".*.tmp"))


def test_points_from_a_search_result_use_the_profile():
    record = {"spec": {"case": "gaussian", "hyper": {"depth": 8, "width": 16}}, "macs_per_pixel": 1e4,
              "mean": {"1": 30.0}}
    results = {"trials": {"a": record, "b": {**record, "spec": {"case": "speckle", "hyper": {}}}}}
    [(name, ms, quality)] = points_from_sweep(results, PROFILE, (256, 256))
    assert (name, quality) == ("a", 30.0)
    # One tile covers a 256 x 256 frame for a receptive field of 17: network on the frame's pixels only.
    expected = 1000 * (1e4 * 256 * 256 / 1e9 * 0.2 + 0.1 + 0.5 * 256 * 256 / 1e6)
    assert ms == predicted_ms(1e4, 16, 17, 1, PROFILE, (256, 256)) == expected


def test_compare_report_shows_the_sizes_tried(tmp_path):
    """A recorded search and a profile give the plot in the compare report; the chosen size is the best PSNR
    predicted under the target (the times follow ``predicted_ms``, checked above)."""
    import json

    import numpy as np
    import pytest
    from skimage import data

    from grainwright.benchmarks.size_plot import size_search_svg
    from grainwright.console.cli import main
    from grainwright.inference.common.errors import InputError
    from grainwright.inference.images.imageio import write_image

    def record(depth: int, width: int, psnr: float) -> dict:
        return {"spec": {"case": "gaussian", "hyper": {"depth": depth, "width": width}},
                "macs_per_pixel": 9.0 * width * width * depth, "mean": {"1": psnr}}

    search = tmp_path / "search.json"
    search.write_text(json.dumps({"trials": {"small": record(4, 16, 29.0), "large": record(16, 64, 30.5)}}))
    profile = tmp_path / "profile.json"
    profile.write_text(json.dumps(PROFILE))
    small_ms = predicted_ms(9.0 * 16 * 16 * 4, 16, 9, 1, PROFILE, (512, 512))
    large_ms = predicted_ms(9.0 * 64 * 64 * 16, 64, 33, 1, PROFILE, (512, 512))
    assert small_ms < large_ms
    texts = [e.text for e in ElementTree.fromstring(
        size_search_svg(search, profile, "512x512", (small_ms + large_ms) / 2)).iter(f"{SVG}text")]
    assert "small (chosen)" in texts
    texts = [e.text for e in ElementTree.fromstring(size_search_svg(search, profile, "512x512")).iter(f"{SVG}text")]
    assert "large (chosen)" in texts
    with pytest.raises(InputError, match="not a size-search results file"):
        size_search_svg(profile, profile)

    noisy = tmp_path / "noisy"
    rng = np.random.default_rng(0)
    write_image(noisy / "camera.png", np.clip(data.camera()[:64, :64] + rng.normal(0, 10, (64, 64)), 0, 255)
                .round().astype(np.uint8))
    code = main(["compare", "--noisy", str(noisy), "--methods", "gaussian", "-o", str(tmp_path / "report"),
                 "--quick", "--threads", "1", "--size-search", str(search), "--profile", str(profile),
                 "--frame", "512x512"])
    assert code == 0
    page = (tmp_path / "report" / "index.html").read_text(encoding="utf-8")
    assert "Model sizes tried" in page and "large (chosen)" in page
