"""``grainwright inspect``: the issue's acceptance check, JSON output, noise descriptions, layouts, bad input."""
from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from no_torch import BLOCK_TORCH
from skimage import color, data

from grainwright.console.cli import main
from grainwright.inference.images.imageio import write_image
from grainwright.inference.noise.models import load_noise, noise_from_dict


def _astronaut_gray_with_sigma_10(seed: int = 0) -> np.ndarray:
    # Open data: scikit-image's astronaut, converted to 8-bit grayscale, Gaussian sigma 10 (8-bit units)
    # added, rounded and clipped to 8 bits: the done-when check.
    gray = np.round(color.rgb2gray(data.astronaut()) * 255)
    noisy = gray + np.random.default_rng(seed).normal(0, 10, gray.shape)
    return np.clip(np.round(noisy), 0, 255).astype(np.uint8)


def _run(args: list[str], capsys) -> tuple[int, str, str]:
    code = main(args)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_done_when_astronaut_sigma_10_within_10_percent_without_torch(tmp_path):
    path = write_image(tmp_path / "astronaut-noisy.png", _astronaut_gray_with_sigma_10())
    script = BLOCK_TORCH + (
        "from grainwright.console.cli import main\n"
        f"sys.exit(main(['inspect', '--json', {str(path)!r}]))\n"
    )
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr
    report = json.loads(result.stdout)
    image = report["images"][0]
    assert image["bit_depth"] == 8 and image["dtype"] == "uint8" and image["shape"] == [512, 512, 1]
    assert image["noise"]["sigma"][0] == pytest.approx(10.0, rel=0.10)
    assert image["noise"]["sigma_percent"][0] == pytest.approx(100 * 10 / 255, rel=0.10)
    assert report["noise_model"]["kind"] == "gaussian"
    assert report["recommendation"]["scheme"] == "recorrupted"


def test_text_report_and_saved_noise_description(tmp_path, capsys):
    path = write_image(tmp_path / "noisy.png", _astronaut_gray_with_sigma_10(1))
    noise_file = tmp_path / "noise.toml"
    code, out, _ = _run(["inspect", str(path), "--save-noise", str(noise_file)], capsys)
    assert code == 0
    assert "sigma" in out and "Recommended scheme: recorrupted" in out
    model = load_noise(noise_file)
    assert model.kind == "gaussian" and model.sigma == pytest.approx(10 / 255, rel=0.10)
    assert "working units" in noise_file.read_text()
    code, _, err = _run(["inspect", str(path), "--save-noise", str(noise_file)], capsys)
    assert code == 2 and "already exists" in err


def test_poisson_gaussian_12_bit_folder(tmp_path, capsys):
    # 12-bit data in 16-bit files: effective bit depth, Poisson-Gaussian model, Anscombe transform.
    model = noise_from_dict({"kind": "poisson-gaussian", "gain": 0.004, "read": 0.004})
    rng = np.random.default_rng(3)
    for name, image in (("camera", data.camera()), ("astronaut", np.round(color.rgb2gray(data.astronaut()) * 255))):
        clean = (image[:384, :384] / 255.0)[..., None]
        noisy = np.clip(np.round(model.sample(clean, rng) * 4095), 0, 4095).astype(np.uint16)
        write_image(tmp_path / "noisy" / f"{name}.tif", noisy)
    noise_file = tmp_path / "noise.toml"
    code, out, _ = _run(["inspect", "--json", str(tmp_path), "--save-noise", str(noise_file)], capsys)
    assert code == 0
    report = json.loads(out)
    assert report["layout"] == "noisy-only"
    assert all(image["bit_depth"] == 12 for image in report["images"])
    assert report["summary"]["noise_kind"] == "poisson-gaussian"
    assert report["recommendation"]["transform"] == "anscombe"
    saved = load_noise(noise_file)
    assert saved.kind == "poisson-gaussian"
    assert saved.gain == pytest.approx(0.004, rel=0.2)


@pytest.mark.parametrize(
    "folders,scheme",
    [(("clean", "noisy"), "supervised"), (("noisy-a", "noisy-b"), "noise2noise"), (("clean",), "supervised")],
)
def test_layouts_give_the_matching_scheme(tmp_path, capsys, folders, scheme):
    rng = np.random.default_rng(4)
    clean = data.camera()[:128, :128].astype(np.float64)
    for folder in folders:
        image = clean if folder == "clean" else clean + rng.normal(0, 12, clean.shape)
        write_image(tmp_path / folder / "scene.png", np.clip(np.round(image), 0, 255).astype(np.uint8))
    code, out, _ = _run(["inspect", "--json", str(tmp_path)], capsys)
    assert code == 0
    report = json.loads(out)
    assert report["recommendation"]["scheme"] == scheme
    if folders == ("clean", "noisy"):
        assert report["images"][0]["pair_sigma"][0] == pytest.approx(12, rel=0.1)  # measured, noisy - clean


def test_static_stack_is_recognised(tmp_path, capsys):
    rng = np.random.default_rng(5)
    clean = data.moon()[:128, :128].astype(np.float64)
    static = np.stack([clean + rng.normal(0, 8, clean.shape) for _ in range(3)])[..., None]
    moving = np.stack([np.roll(clean, 9 * i, axis=1) + rng.normal(0, 8, clean.shape) for i in (0, 1)])[..., None]
    write_image(tmp_path / "static.tif", np.clip(static, 0, 255).astype(np.uint8))
    write_image(tmp_path / "moving.tif", np.clip(moving, 0, 255).astype(np.uint8))
    code, out, _ = _run(["inspect", "--json", str(tmp_path / "static.tif"), str(tmp_path / "moving.tif")], capsys)
    report = json.loads(out)
    found = {image["path"].split("/")[-1]: image["static_stack"] for image in report["images"]}
    assert found == {"static.tif": True, "moving.tif": False}


def test_bad_files_are_reported_and_the_batch_goes_on(tmp_path, capsys):
    good = write_image(tmp_path / "good.png", _astronaut_gray_with_sigma_10()[:128, :128])
    (tmp_path / "broken.png").write_bytes(good.read_bytes()[:200])
    np.save(tmp_path / "nan.npy", np.full((32, 32), np.nan, np.float32))
    code, out, err = _run(["inspect", "--json", str(tmp_path)], capsys)
    assert code == 1
    report = json.loads(out)
    assert [image["path"].split("/")[-1] for image in report["images"]] == ["good.png"]
    assert {failure["path"].split("/")[-1] for failure in report["failures"]} == {"broken.png", "nan.npy"}
    assert "broken.png" in err and "nan.npy" in err
    code, _, err = _run(["inspect", str(tmp_path / "missing.tif")], capsys)
    assert code == 1 and "missing.tif: no such file" in err


def test_too_small_images_are_refused_by_name(tmp_path, capsys):
    write_image(tmp_path / "strip.png", np.zeros((1, 40), np.uint8))
    code, _, err = _run(["inspect", str(tmp_path / "strip.png")], capsys)
    assert code == 1 and "strip.png: 1 x 40 pixels is too small" in err
