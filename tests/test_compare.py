"""``grainwright compare`` end to end on small sample-image crops, with and without ground truth.

Open data: crops of scikit-image's camera and coins images with Gaussian noise added here. Outside references:
SciPy's ``uniform_filter`` for the output of the stand-in ONNX model (a 3x3 box mean written as an ONNX graph),
``skimage.metrics.peak_signal_noise_ratio`` for its PSNR.
"""
from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from scipy import ndimage
from skimage import data
from skimage.metrics import peak_signal_noise_ratio

from grainwright.console.cli import main
from grainwright.inference.common.errors import ConfigError, InputError
from grainwright.inference.evaluation.compare import (
    CompareOptions,
    parse_methods,
    run_comparison,
)
from grainwright.inference.images.imageio import write_image

QUICK = CompareOptions(quick=True, threads=1)
FAST_METHODS = "box.onnx,gaussian,median"


def box_mean_model(path: Path, channels: int = 1, kernel: np.ndarray | None = None) -> Path:
    """A 3x3 box mean per channel (or another 3x3 ``kernel``, correlated as ONNX Conv does) as an ONNX graph with
    grainwright metadata (zero padding at the border)."""
    kernel = np.full((3, 3), 1 / 9) if kernel is None else kernel
    weight = numpy_helper.from_array(np.tile(np.asarray(kernel, np.float32), (channels, 1, 1, 1)), "weight")
    node = helper.make_node("Conv", ["image", "weight"], ["denoised"], pads=[1, 1, 1, 1], group=channels)
    graph = helper.make_graph(
        [node], "box-mean",
        [helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", channels, "H", "W"])],
        [helper.make_tensor_value_info("denoised", TensorProto.FLOAT, ["N", channels, "H", "W"])], [weight],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    metadata = {
        "format": "grainwright-model", "format_version": 1,
        "architecture": {"name": "box-mean", "hyper": {}},
        "receptive_field": 3, "alignment": 1, "tile_margin": 1,
        "channels": channels, "takes_noise_map": False,
        "normalization": {"dtype": "uint8", "bit_depth": 8, "low": 0.0, "high": 255.0},
    }
    helper.set_model_props(model, {"grainwright": json.dumps(metadata)})
    onnx.save(model, str(path))
    return path


@pytest.fixture(scope="module")
def dataset(tmp_path_factory) -> Path:
    """noisy/ and clean/ with two 96x96 8-bit crops (camera, coins), Gaussian noise of 15 grey levels."""
    root = tmp_path_factory.mktemp("compare")
    rng = np.random.default_rng(0)
    crops = {"camera.png": data.camera()[120:216, 200:296], "coins.png": data.coins()[60:156, 80:176]}
    for name, clean in crops.items():
        noisy = np.clip(np.rint(clean + 15.0 * rng.standard_normal(clean.shape)), 0, 255).astype(np.uint8)
        write_image(root / "clean" / name, clean)
        write_image(root / "noisy" / name, noisy)
    box_mean_model(root / "box.onnx")
    box_mean_model(root / "box-rgb.onnx", channels=3)
    return root


def _assert_offline(report: Path) -> None:
    page = (report / "index.html").read_text(encoding="utf-8")
    assert not re.search(r"(?i)https?:|//[a-z0-9.-]+\.[a-z]{2,}/", page), "index.html must not reference the network"
    sources = re.findall(r"""(?:src|href)\s*=\s*['"]([^'"]+)['"]""", page)
    assert sources, "the report shows images"
    for source in sources:
        assert not Path(source).is_absolute()
        assert (report / source).is_file(), source


@pytest.fixture(scope="module")
def with_truth(dataset, tmp_path_factory):
    out = tmp_path_factory.mktemp("reports") / "with-truth"
    methods = ",".join(str(dataset / m) if m.endswith(".onnx") else m for m in FAST_METHODS.split(","))
    return run_comparison(dataset / "noisy", methods, out, clean_dir=dataset / "clean", options=QUICK)


def test_with_ground_truth_ranks_by_psnr_and_labels_tuning(with_truth, dataset):
    result = with_truth
    assert [entry["rank"] for entry in result.ranking] == [1, 2, 3]
    psnrs = [entry["psnr"] for entry in result.ranking]
    assert psnrs == sorted(psnrs, reverse=True)
    for entry in result.ranking:
        expected = "learned" if entry["method"] == "box" else "classical"
        assert entry["kind"] == expected
        if expected == "classical":
            assert entry["parameter_choice"] == "tuned on ground truth"
        assert entry["seconds_per_megapixel"] > 0
        assert 0 < entry["ssim"] <= 1 and 0 < entry["ms_ssim"] <= 1
        assert entry["sure_psnr"] is not None
    # Every table on the page says how the classical parameters were chosen.
    page = (result.report_dir / "index.html").read_text(encoding="utf-8")
    tables = page.split("<table")[1:]
    assert len(tables) == 3
    assert all("tuned on ground truth" in table for table in tables)
    assert "Caution" in page and "not a substitute" in page


def test_learned_model_output_matches_scipy_box_mean(with_truth, dataset):
    # The ONNX path (native values -> model -> working range) against SciPy's uniform filter with zero padding,
    # scored by scikit-image's PSNR: the report's figure must be that same number.
    from grainwright.inference.images.imageio import read_image

    for name in ("camera.png", "coins.png"):
        noisy = read_image(dataset / "noisy" / name)[:, :, 0].astype(np.float64)
        clean = read_image(dataset / "clean" / name)[:, :, 0].astype(np.float64)
        expected_output = np.clip(ndimage.uniform_filter(noisy, 3, mode="constant"), 0, 255)
        expected = peak_signal_noise_ratio(clean, expected_output, data_range=255)
        row = next(r for r in with_truth.per_image if r["image"] == name and r["method"] == "box")
        assert row["psnr"] == pytest.approx(expected, abs=1e-3)


def test_report_files_and_offline_page(with_truth):
    report = with_truth.report_dir
    _assert_offline(report)
    lines = (report / "results.csv").read_text(encoding="utf-8").strip().splitlines()
    assert len(lines) == 1 + 2 * 3  # header, two images x three methods
    assert "seconds_per_megapixel" in lines[0]
    document = json.loads((report / "results.json").read_text(encoding="utf-8"))
    assert document["ranking"][0]["method"] == with_truth.ranking[0]["method"]
    assert document["regions"], "regions were found automatically"
    assert any(f.startswith("Removed the most structure") for f in document["findings"])
    assert "caution" in document


def test_without_ground_truth_ranks_by_sure_and_reports_no_reference_figures(dataset, tmp_path):
    rois = tmp_path / "rois.json"
    rois.write_text(json.dumps({"coins.png": {"coin-edge": {"feature": [30, 30, 8, 8], "background": [2, 2, 8, 8]}}}))
    result = run_comparison(dataset / "noisy", ["gaussian,median", str(dataset / "box.onnx")], tmp_path / "out",
                            rois=rois, options=QUICK)
    assert not result.ground_truth
    assert [entry["sure_rank"] for entry in result.ranking] == [1, 2, 3]
    for entry in result.ranking:
        assert "psnr" not in entry or entry["psnr"] is None
        assert entry["j_invariant_loss"] > 0
        assert 0 <= entry["noise_left"] < 1.2
        if entry["kind"] == "classical":
            assert entry["parameter_choice"].startswith("calibrated without ground truth")
    coins_regions = {d["region"] for d in result.regions if d["image"] == "coins.png"}
    assert coins_regions == {"coin-edge"}
    assert any(d["region"].startswith("auto-") for d in result.regions if d["image"] == "camera.png")
    _assert_offline(result.report_dir)


def test_ensemble_rows_score_the_flip_rotation_average_beside_the_plain_model(dataset, tmp_path):
    # A model that copies each pixel's right-hand neighbour. Its 8-fold flip/rotation ensemble averages the 8
    # transformed copies: each of the 4 direct neighbours twice, i.e. SciPy's correlation with the 4-neighbour
    # mean kernel (zero padding as the graph's). Both rows' PSNR against skimage's, on those SciPy outputs.
    from grainwright.inference.images.imageio import read_image

    right = np.zeros((3, 3))
    right[1, 2] = 1.0
    model = box_mean_model(tmp_path / "shift.onnx", kernel=right)
    cross = np.array([[0, 0.25, 0], [0.25, 0, 0.25], [0, 0.25, 0]])
    options = CompareOptions(quick=True, threads=1, ensemble_rows=8)
    result = run_comparison(dataset / "noisy", [str(model)], tmp_path / "report", clean_dir=dataset / "clean",
                            options=options)
    assert {entry["method"] for entry in result.ranking} == {"shift", "shift x8"}
    ensemble_row = next(entry for entry in result.ranking if entry["method"] == "shift x8")
    assert ensemble_row["kind"] == "learned" and "8-fold" in ensemble_row["parameter_choice"]
    for name in ("camera.png", "coins.png"):
        noisy = read_image(dataset / "noisy" / name)[:, :, 0].astype(np.float64)
        clean = read_image(dataset / "clean" / name)[:, :, 0].astype(np.float64)
        for method, kernel in (("shift", right), ("shift x8", cross)):
            expected_output = np.clip(ndimage.correlate(noisy, kernel, mode="constant"), 0, 255)
            expected = peak_signal_noise_ratio(clean, expected_output, data_range=255)
            row = next(r for r in result.per_image if r["image"] == name and r["method"] == method)
            assert row["psnr"] == pytest.approx(expected, abs=1e-3)


def test_ensemble_rows_of_a_size_the_runtime_lacks_are_refused(dataset, tmp_path, capsys):
    with pytest.raises(ConfigError, match="--ensemble-rows must be one of"):
        run_comparison(dataset / "noisy", [str(dataset / "box.onnx")], tmp_path / "r",
                       options=CompareOptions(quick=True, threads=1, ensemble_rows=3))
    code, err = _cli(["--noisy", str(dataset / "noisy"), "--methods", str(dataset / "box.onnx"), "--stacks",
                      "--ensemble-rows", "2", "-o", str(tmp_path / "r2")], capsys)
    assert code == 2 and "--ensemble-rows" in err and len(err.splitlines()) == 1
    assert not (tmp_path / "r").exists() and not (tmp_path / "r2").exists()


def test_parse_methods_expands_and_suggests(dataset):
    names = [spec.label for spec in parse_methods("all-classical,gaussian")]
    assert "bm3d" in names and names.count("gaussian") == 1
    with pytest.raises(ConfigError, match="did you mean gaussian"):
        parse_methods("gausian")
    with pytest.raises(InputError, match="model file not found"):
        parse_methods(str(dataset / "missing.onnx"))


def _cli(args: list[str], capsys) -> tuple[int, str]:
    code = main(["compare", *args])
    return code, capsys.readouterr().err.strip()


def test_bad_input_gives_one_line_errors(dataset, tmp_path, capsys):
    noisy, clean = str(dataset / "noisy"), str(dataset / "clean")
    code, err = _cli(["--noisy", noisy, "--methods", "gausian", "-o", str(tmp_path / "r1")], capsys)
    assert code == 2 and "did you mean gaussian" in err and len(err.splitlines()) == 1

    code, err = _cli(["--noisy", noisy, "--methods", str(dataset / "box-rgb.onnx"), "-o", str(tmp_path / "r2")],
                     capsys)
    assert code == 2 and "box-rgb.onnx" in err and "3 channel" in err and len(err.splitlines()) == 1

    partial = tmp_path / "clean-partial"
    write_image(partial / "camera.png", np.zeros((96, 96), np.uint8))
    code, err = _cli(["--noisy", noisy, "--clean", str(partial), "--methods", "mean", "-o", str(tmp_path / "r3")],
                     capsys)
    assert code == 2 and "coins.png" in err and "no clean image" in err

    wrong_shape = tmp_path / "clean-shape"
    write_image(wrong_shape / "camera.png", np.zeros((90, 96), np.uint8))
    write_image(wrong_shape / "coins.png", np.zeros((96, 96), np.uint8))
    code, err = _cli(["--noisy", noisy, "--clean", str(wrong_shape), "--methods", "mean", "-o",
                      str(tmp_path / "r4")], capsys)
    assert code == 2 and "camera.png" in err and "shape" in err

    tiny = tmp_path / "tiny"
    write_image(tiny / "speck.png", np.zeros((8, 40), np.uint8))
    code, err = _cli(["--noisy", str(tiny), "--methods", "mean", "-o", str(tmp_path / "r6")], capsys)
    assert code == 2 and "speck.png" in err and "at least 16" in err

    existing = tmp_path / "r5"
    existing.mkdir()
    (existing / "keep.txt").write_text("user data")
    code, err = _cli(["--noisy", noisy, "--clean", clean, "--methods", "mean", "-o", str(existing)], capsys)
    assert code == 2 and "--overwrite" in err
    assert (existing / "keep.txt").read_text() == "user data"
    for name in ("r1", "r2", "r3", "r4", "r6"):
        assert not (tmp_path / name).exists(), "nothing half-written"


def test_poisson_gaussian_data_is_scored_in_the_anscombe_domain(tmp_path):
    # 12-bit data in uint16 with Poisson-Gaussian noise (variance = gain * signal + read^2, working units), made
    # with the project's noise registry from scikit-image's coins and camera crops.
    from grainwright.inference.noise.models import noise_from_dict

    noise = noise_from_dict({"kind": "poisson-gaussian", "gain": 0.004, "read": 0.01})
    rng = np.random.default_rng(4)
    for name, image in {"coins.tif": data.coins()[40:168, 60:188], "camera.tif": data.camera()[60:188, 200:328]}.items():
        clean = (0.1 + 0.8 * image / 255.0).astype(np.float32)
        noisy = noise.sample(clean[:, :, None], rng)[:, :, 0]
        write_image(tmp_path / "clean" / name, np.rint(clean * 4095).astype(np.uint16))
        write_image(tmp_path / "noisy" / name, np.clip(np.rint(noisy * 4095), 0, 4095).astype(np.uint16))
    options = CompareOptions(quick=True, threads=1, noise="poisson-gaussian")
    result = run_comparison(tmp_path / "noisy", "mean,gaussian,nlm", tmp_path / "report", clean_dir=tmp_path / "clean",
                            options=options)
    assert {row["sure_domain"] for row in result.per_image} == {"Anscombe domain"}
    assert "Poisson-Gaussian" in result.settings["noise"]
    compared = 0
    for i, a in enumerate(result.ranking):
        for b in result.ranking[i + 1:]:
            if abs(a["psnr"] - b["psnr"]) >= 1.0:
                compared += 1
                assert (a["psnr"] > b["psnr"]) == (a["sure_psnr"] > b["sure_psnr"]), (a["method"], b["method"])
    assert compared >= 1


def test_cli_prints_the_ranking_and_writes_the_report(dataset, tmp_path, capsys):
    out = tmp_path / "report"
    code = main(["compare", "--noisy", str(dataset / "noisy"), "--methods", "mean,gaussian", "-o", str(out),
                 "--quick", "--threads", "1"])
    printed = capsys.readouterr().out
    assert code == 0
    assert "SURE estimated PSNR" in printed and "calibrated without ground truth" in printed
    assert f"report: {out / 'index.html'}" in printed
    assert (out / "results.csv").is_file() and (out / "results.json").is_file()
