"""The starting model: its recipe (generated data, determinism, resume) and its export for a user's data."""
from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
import torch

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.images.imageio import write_image
from grainwright.inference.runtime.modelinfo import read_model_metadata, render_metadata
from grainwright.inference.runtime.runner import OnnxDenoiser
from grainwright.models.checkpoint import checkpoint_payload, load_checkpoint
from grainwright.models.export import PARITY_TOLERANCE
from grainwright.models.registry import build_model
from grainwright.models.starting import export_starting_model
from grainwright.trainer.generated import (
    STARTING_NORMALIZATION,
    GeneratedPatches,
    load_recipe,
    photo_source,
    train_generated,
)

torch.set_num_threads(1)


def _tiny_starting_payload() -> dict:
    """A starting checkpoint of the shipped kind (float data in [0, 1], a level range) with a tiny network."""
    torch.manual_seed(0)
    model = build_model("unet-noisemap", 1, levels=2, width=4)
    return checkpoint_payload(model, STARTING_NORMALIZATION, training_noise={
        "sigma_native": 0.15, "sigma_native_range": [0.0, 0.3], "effective_bit_depth": None})


def test_recipe_is_the_trainers_config_plus_a_generated_table(tmp_path):
    recipe = load_recipe("starting-model")
    assert recipe["model"]["name"] == "unet-noisemap" and recipe["scheme"] == "supervised"
    assert 0 < recipe["generated"]["sigma_max"] <= 1
    assert load_recipe("starting-model", ["generated.pool=3"])["generated"]["pool"] == 3
    with pytest.raises(ConfigError, match="generated.pooll: unknown key"):
        load_recipe("starting-model", ["generated.pooll=3"])
    with pytest.raises(ConfigError, match="scheme"):
        load_recipe("starting-model", ['scheme="masked"'])


def test_inverse_level_weighting_divides_each_patchs_error_by_its_level():
    """`level_weighting = "inverse"`: patch i's squared error counts in proportion to 1 / max(level_i, floor)
    ** exponent, normalised to mean 1, against the plain mean squared error of `none` (computed here by hand)."""
    from grainwright.trainer.generated import LevelRangeSupervised

    recipe = load_recipe("starting-model")
    torch.manual_seed(0)
    model = build_model("unet-noisemap", 1, levels=2, width=4)
    rng = np.random.default_rng(0)
    levels = np.array([0.0, 0.05, 0.2], dtype=np.float32)  # the first is below the floor
    plain = LevelRangeSupervised(recipe, 0.3)
    batch = plain.prepare({"clean": rng.random((3, 1, 16, 16), dtype=np.float32)}, rng, levels=levels)
    tensors = {key: torch.from_numpy(value) for key, value in batch.items()}
    with torch.no_grad():
        per_patch = ((model(tensors["noisy"], tensors["level"]) - tensors["clean"]) ** 2).mean(dim=(1, 2, 3))
        weighted = LevelRangeSupervised(recipe, 0.3, "inverse", 0.02).loss(model, tensors, 1.0)
        unweighted = plain.loss(model, tensors, 1.0)
        squared_weighting = LevelRangeSupervised(recipe, 0.3, "inverse", 0.02, 2.0).loss(model, tensors, 1.0)
    for exponent, loss in ((1.0, weighted), (2.0, squared_weighting)):
        weights = np.maximum(levels, 0.02) ** -exponent
        expected = float(np.mean(per_patch.numpy() * weights / weights.mean()))
        assert float(loss) == pytest.approx(expected, rel=1e-5)
    assert float(unweighted) == pytest.approx(float(per_patch.mean()), rel=1e-5)
    with pytest.raises(ConfigError, match="generated.level_weighting"):
        load_recipe("starting-model", ['generated.level_weighting="square"'])


def test_generated_patches_mix_dead_leaves_and_photos_deterministically():
    recipe = load_recipe("starting-model", ["generated.pool=3", "generated.image_size=96", "generated.radius_max=40"])
    photos = photo_source(("brick", "page"))
    first = GeneratedPatches(7, recipe["generated"], photos)
    again = GeneratedPatches(7, recipe["generated"], photos)
    for _ in range(9):  # past a few pool refreshes
        a = first.sample(np.random.default_rng(1), 16, 32)["clean"]
        b = again.sample(np.random.default_rng(1), 16, 32)["clean"]
        np.testing.assert_array_equal(a, b)
    assert a.shape == (16, 1, 32, 32) and a.dtype == np.float32
    # A source started at step 9 holds the same pool as one that took 9 steps.
    resumed = GeneratedPatches(7, recipe["generated"], photos, start_step=9)
    np.testing.assert_array_equal(resumed.images, first.images)


def test_the_refinement_recipe_continues_an_earlier_run_and_packages_both_stages(tmp_path):
    """The shipped weights come from two stages: `starting-model` and `starting-model-refine` started from its
    run (start.weights). The second starts from the first's final checkpoint and records which (SHA-256), and its manifest carries the first stage and the two-line command."""
    from grainwright.trainer.generated import package_run

    tiny = ["model.precision=\"float32\"", "model.hyper.levels=2", "model.hyper.width=4", "generated.pool=2",
            "generated.image_size=64", "generated.validation_images=1", "validation.patches=16",
            "validation.every_steps=2", "budget.steps=2"]
    quiet = {"announce": lambda message: None}
    _, first = train_generated("starting-model", tmp_path / "first", assignments=tiny, **quiet)
    start = f"start.weights=\"{first.root}\""
    summary, second = train_generated("starting-model-refine", tmp_path / "second", assignments=[*tiny, start],
                                      **quiet)
    started = summary["started_from"]
    assert started["weights"] == "earlier run" and started["steps"] == 2
    assert started["sha256"] == hashlib.sha256(first.best.read_bytes()).hexdigest()
    manifest = package_run(second.root, tmp_path / "into", recipe_path="starting-model-refine")
    assert manifest["recipe"]["file"] == "configs/starting-model-refine.toml"
    assert "--recipe starting-model-refine --set start.weights=" in manifest["recipe"]["command"]
    assert manifest["steps"] == 2 and manifest["total_steps"] == 4  # the run's own, and over both stages
    (stage,) = manifest["earlier_stages"]
    assert stage["steps"] == 2 and stage["resolved"]["generated"]["level_weighting"] == "none"
    assert manifest["recipe"]["resolved"]["generated"]["level_weighting"] == "inverse"
    with pytest.raises(ConfigError, match="start.weights"):
        train_generated("starting-model-refine", tmp_path / "third", assignments=tiny, **quiet)


def test_a_refinement_of_the_shipped_weights_packages_every_stage_behind_them(tmp_path):
    """A recipe started from the shipped weights (start.weights = "starting-model", as the textures stage was)
    carries the shipped manifest's stages in its own, and a command that reproduces all of them."""
    from grainwright.models.starting import starting_model_manifest
    from grainwright.trainer.generated import package_run

    shipped = starting_model_manifest()
    short = ["model.precision=\"float32\"", "data.patch_size=32", "data.batch_size=2", "generated.pool=2",
             "generated.image_size=64", "generated.validation_images=1", "validation.patches=4",
             "validation.every_steps=2", "budget.steps=2", "start.weights=\"starting-model\""]
    summary, run = train_generated("starting-model-textures", tmp_path / "run", assignments=short,
                                   announce=lambda message: None)
    assert summary["started_from"]["sha256"] == shipped["weights_sha256"]
    manifest = package_run(run.root, tmp_path / "into", recipe_path="starting-model-textures")
    stages = manifest["earlier_stages"]
    assert len(stages) == len(shipped.get("earlier_stages", [])) + 1
    assert stages[-1]["checkpoint_sha256"] == shipped["weights_sha256"]
    assert manifest["total_steps"] == shipped["total_steps"] + 2
    command = manifest["recipe"]["command"]
    assert command.startswith(shipped["recipe"]["command"].replace("RUN_DIR", f"STAGE{len(stages)}_DIR"))
    assert command.endswith(f"--recipe starting-model-textures --set start.weights='\"STAGE{len(stages)}_DIR\"' "
                            "--out RUN_DIR")


@pytest.mark.slow
def test_twenty_steps_of_the_shipped_recipe_reproduce_exactly(tmp_path):
    # Determinism of the recipe: a run of its first 20 steps from its seed, and another stopped at step 10 and
    # resumed (the dead-leaves pool rebuilt for that step), end with identical weights. float32 pinned: the test
    # must not depend on whether this CPU runs bfloat16 natively (the recipe's own `auto` measures it).
    pinned = ["model.precision=\"float32\"", "validation.every_steps=10"]
    quiet = {"announce": lambda message: None}
    summary, straight = train_generated("starting-model", tmp_path / "straight", assignments=pinned,
                                        interrupt_at_step=20, **quiet)
    assert summary["steps"] == 20 and summary["validation_history"][0]["step"] == 10
    _, stopped = train_generated("starting-model", tmp_path / "stopped", assignments=pinned, interrupt_at_step=10,
                                 **quiet)
    train_generated(None, resume=stopped.root, interrupt_at_step=20, **quiet)
    first, second = (load_checkpoint(run.last) for run in (straight, stopped))
    assert first["step"] == second["step"] == 20
    for key, value in first["state_dict"].items():
        assert torch.equal(value, second["state_dict"][key]), key
    # The weights moved from their seeded start.
    torch.manual_seed(load_recipe("starting-model")["seed"])
    start = build_model("unet-noisemap", 1, levels=3, width=16)
    assert not torch.equal(start.head.weight, first["state_dict"]["head.weight"])


@pytest.mark.parametrize("kind", ["uint8", "12-bit", "float32"])
def test_exports_for_the_users_data_with_onnx_parity(tmp_path, kind):
    rng = np.random.default_rng(0)
    clean = rng.random((64, 72, 1))
    array = {"uint8": np.round(clean * 255).astype(np.uint8),
             "12-bit": np.round(clean * 4095).astype(np.uint16),
             "float32": clean.astype(np.float32) * 3.0 - 1.0}[kind]
    (tmp_path / "samples").mkdir()
    write_image(tmp_path / "samples" / ("a.npy" if kind == "float32" else "a.tif"), array)
    output = tmp_path / "start.onnx"
    export_starting_model(tmp_path / "samples", output)  # the shipped weights
    metadata = read_model_metadata(output)
    assert metadata["takes_noise_map"] and metadata["architecture"]["name"] == "unet-noisemap"
    assert metadata["parity"]["calibration"]["max_abs_diff"] <= PARITY_TOLERANCE  # on a crop of the samples
    assert metadata["parity"]["random"]["max_abs_diff"] <= PARITY_TOLERANCE
    normalization = metadata["normalization"]
    if kind == "12-bit":
        assert normalization["bit_depth"] == 12 and normalization["high"] == 4095
    if kind == "uint8":
        assert normalization["high"] == 255
    # The training level range (0 to 75/255 of the range) follows the data's range.
    span = normalization["high"] - normalization["low"]
    assert metadata["training_noise"]["sigma_native_range"][1] == pytest.approx(75 / 255 * span)
    denoised = OnnxDenoiser(output, threads=1).run(array, as_float=True)
    assert denoised.shape == array.shape and np.isfinite(denoised).all()


def test_colour_data_is_denoised_channel_by_channel(tmp_path):
    rgb = np.round(np.random.default_rng(1).random((48, 48, 3)) * 255).astype(np.uint8)
    (tmp_path / "samples").mkdir()
    write_image(tmp_path / "samples" / "rgb.png", rgb)
    output = tmp_path / "start.onnx"
    export_starting_model(tmp_path / "samples", output, payload=_tiny_starting_payload())
    metadata = read_model_metadata(output)
    assert metadata["channels"] == 3 and metadata["architecture"]["hyper"]["per_channel"] is True
    denoiser = OnnxDenoiser(output, threads=1, noise_sigma=5.0)
    together = denoiser.run(rgb, as_float=True)
    # Each channel alone (a grayscale export of the same network) gives the same result.
    (tmp_path / "gray").mkdir()
    write_image(tmp_path / "gray" / "g.png", rgb[..., :1])
    gray = tmp_path / "gray.onnx"
    export_starting_model(tmp_path / "gray", gray, payload=_tiny_starting_payload())
    alone = OnnxDenoiser(gray, threads=1, noise_sigma=5.0).run(rgb[..., 1:2], as_float=True)
    np.testing.assert_allclose(together[..., 1:2], alone, atol=1e-3)


def test_noise_descriptions_choose_the_domain(tmp_path):
    from grainwright.inference.noise.models import noise_from_dict, save_noise

    (tmp_path / "samples").mkdir()
    write_image(tmp_path / "samples" / "a.tif", np.full((40, 40, 1), 1000, np.uint16))
    save_noise(noise_from_dict({"kind": "poisson-gaussian", "gain": 0.01, "read": 0.02}), tmp_path / "pg.toml")
    export_starting_model(tmp_path / "samples", tmp_path / "pg.onnx", noise_path=tmp_path / "pg.toml",
                          bit_depth=12, payload=_tiny_starting_payload())
    assert read_model_metadata(tmp_path / "pg.onnx")["normalization"]["transform"]["kind"] == "anscombe"
    save_noise(noise_from_dict({"kind": "speckle-gamma", "looks": 4.0}), tmp_path / "speckle.toml")
    export_starting_model(tmp_path / "samples", tmp_path / "speckle.onnx", noise_path=tmp_path / "speckle.toml",
                          bit_depth=12, payload=_tiny_starting_payload())
    assert read_model_metadata(tmp_path / "speckle.onnx")["normalization"]["transform"]["kind"] == "log"
    save_noise(noise_from_dict({"kind": "speckle-rayleigh"}), tmp_path / "rayleigh.toml")
    with pytest.raises(ConfigError, match="speckle-rayleigh"):
        export_starting_model(tmp_path / "samples", tmp_path / "r.onnx", noise_path=tmp_path / "rayleigh.toml",
                              payload=_tiny_starting_payload())
    assert not (tmp_path / "r.onnx").exists()


def _speckle_samples(folder, looks: float, seed: int = 0):
    """A smooth generated image (a blurred dead-leaves image, 4% to 24% of a 16-bit range) and the same image under
    gamma speckle of ``looks`` looks, written as the sample; with its ``noise.toml``."""
    from scipy.ndimage import gaussian_filter

    from grainwright.inference.noise.models import noise_from_dict, save_noise
    from grainwright.inference.synthetic.dead_leaves import DeadLeavesSettings, dead_leaves_image

    rng = np.random.default_rng(seed)
    leaves = dead_leaves_image(rng, DeadLeavesSettings(size=128, radius_min=8.0, radius_max=64.0,
                                                       texture_fraction=0.0, blur_probability=0.0))
    clean = (0.04 + 0.2 * gaussian_filter(leaves.astype(np.float64), 2.0)) * 65535.0
    noise = noise_from_dict({"kind": "speckle-gamma", "looks": looks})
    noisy = np.clip(np.rint(noise.sample(clean.astype(np.float32), rng)), 0, 65535).astype(np.uint16)
    folder.mkdir()
    write_image(folder / "speckled.tif", noisy[..., None])
    save_noise(noise, folder.parent / f"speckle-{looks:g}.toml")
    return clean, noisy, folder.parent / f"speckle-{looks:g}.toml"


@pytest.mark.parametrize("looks", [1.0, 4.0, 10.0])
def test_speckle_reaches_the_network_as_noise_of_the_trigamma_level(tmp_path, looks):
    """In the log domain gamma speckle of L looks is additive noise of variance polygamma(1, L) (trigamma) and mean
    psi(L) - ln L (Xie, Pierce and Ulaby, IEEE TGRS 2002, from memory; the moments of log-gamma variables, SciPy's
    ``scipy.special.polygamma`` and ``digamma`` as the reference)."""
    from scipy.special import digamma, polygamma

    from grainwright.models.starting import normalization_for_samples, starting_working_level
    from grainwright.models.working_range import WorkingRange

    _, _, noise_path = _speckle_samples(tmp_path / "samples", looks)
    normalization, noise = normalization_for_samples(tmp_path / "samples", noise_path, bit_depth=16)
    transform = normalization.transform
    assert transform["kind"] == "log" and transform["bias"] == pytest.approx(digamma(looks) - np.log(looks))
    expected = np.sqrt(polygamma(1, looks)) / transform["scale"]  # working units: the log over its scale
    assert starting_working_level(normalization, noise) == pytest.approx(expected, rel=1e-9)
    # The exported graph's conversion of the per-pixel speckle level (what --noise-sigma model feeds it).
    signal = 0.8
    sigma_native = torch.tensor(signal / np.sqrt(looks) * 65535.0, dtype=torch.float32).reshape(1, 1, 1, 1)
    graph_level = WorkingRange(normalization).noise_sigma_to_working(
        sigma_native, torch.full((1, 1, 1, 1), signal * 65535.0)).item()
    epsilon = transform["epsilon"]
    assert graph_level == pytest.approx(expected * signal / (signal + epsilon), rel=1e-5)
    # ... and both agree with the spread of simulated speckle in the working domain. At one look the exponential
    # speckle's lower tail reaches the transform's epsilon floor, which trims the log spread by about 5%.
    rng = np.random.default_rng(1)
    speckled = signal * 65535.0 * rng.gamma(looks, 1.0 / looks, 400_000)
    measured = float(np.std(normalization.to_working(speckled.astype(np.float32))))
    assert graph_level == pytest.approx(measured, rel=0.07 if looks == 1.0 else 0.03)


def test_the_speckle_export_matches_torch_and_improves_psnr(tmp_path):
    from grainwright.inference.evaluation.metrics import psnr
    from grainwright.inference.images.normalization import Normalization
    from grainwright.inference.noise.models import noise_from_dict
    from grainwright.models.checkpoint import model_from_checkpoint
    from grainwright.models.export import reference_output
    from grainwright.models.starting import normalization_for_samples, starting_checkpoint_for

    clean, noisy, noise_path = _speckle_samples(tmp_path / "samples", 4.0)
    lines = []
    output = tmp_path / "speckle.onnx"
    export_starting_model(tmp_path / "samples", output, noise_path=noise_path, bit_depth=16, log=lines.append)
    metadata = read_model_metadata(output)
    assert metadata["parity"]["calibration"]["max_abs_diff"] <= PARITY_TOLERANCE
    assert any("log domain" in line and "--noise-sigma auto" in line for line in lines)
    assert not any(line.startswith("warning") for line in lines)  # 4 looks lie inside the trained range
    denoised = OnnxDenoiser(output, threads=1, noise_sigma="model").run(noisy[..., None], as_float=True)[..., 0]
    # ONNX Runtime against torch (numpy normalisation, torch network) with the runtime's speckle noise map.
    normalization = Normalization.from_dict(metadata["normalization"])
    model = model_from_checkpoint(starting_checkpoint_for(*normalization_for_samples(
        tmp_path / "samples", noise_path, bit_depth=16)))
    image = noisy[None, None].astype(np.float32)
    level = noise_from_dict(metadata["noise"]).sigma_map(np.clip(image / 65535.0, 0, 1)) * 65535.0
    expected = reference_output(model, normalization, image, level.astype(np.float32))[0, 0]
    assert np.max(np.abs(denoised - expected)) / 65535.0 <= PARITY_TOLERANCE
    # On the smooth image the speckle is mostly removed, and the log-domain bias with it: no 12% darkening.
    peak = float(clean.max())
    gain = psnr(clean, denoised, peak) - psnr(clean, noisy.astype(np.float64), peak)
    assert gain > 3.0, gain
    assert denoised.mean() / clean.mean() == pytest.approx(1.0, abs=0.03)


def test_speckle_above_the_trained_range_is_said_in_the_export_log(tmp_path):
    from grainwright.models.starting import starting_normalization

    _, _, noise_path = _speckle_samples(tmp_path / "samples", 0.3)  # fewer than one look: a very wide log spread
    lines = []
    export_starting_model(tmp_path / "samples", tmp_path / "s.onnx", noise_path=noise_path, bit_depth=16,
                          payload=_tiny_starting_payload(), log=lines.append)
    assert sum(line.startswith("warning: the noise level in the log domain") for line in lines) == 1
    # A log transform without the number of looks gives neither the level nor the bias.
    from grainwright.inference.images.normalization import Normalization

    with pytest.raises(ConfigError, match="number of looks"):
        starting_normalization(Normalization("uint16", 16, 0.0, 65535.0, 1).with_log())


def test_a_finished_run_packages_as_weights_and_manifest(tmp_path):
    from grainwright.inference.common.tomlio import write_toml
    from grainwright.models.checkpoint import RunFolder, save_checkpoint
    from grainwright.trainer.generated import package_run

    recipe = load_recipe("starting-model", ["budget.steps=3"])
    run = RunFolder(tmp_path / "run")
    run.root.mkdir()
    write_toml(run.config, recipe)
    payload = _tiny_starting_payload()
    save_checkpoint(run.best, dict(payload, training_summary={"steps": 2, "minutes": 0.1}))
    with pytest.raises(ConfigError, match="stopped at step 2 of its budget 3"):
        package_run(run.root, tmp_path / "into")
    save_checkpoint(run.best, dict(payload, training_summary={"steps": 3, "minutes": 0.1}))
    manifest = package_run(run.root, tmp_path / "into", extra={"benchmark": {"note": "none"}})
    weights = tmp_path / "into" / "starting-model.pt"
    assert manifest["weights_sha256"] == hashlib.sha256(weights.read_bytes()).hexdigest()
    assert json.loads((tmp_path / "into" / "starting-model.json").read_text()) == manifest
    assert manifest["steps"] == 3 and manifest["seed"] == recipe["seed"] and manifest["benchmark"]
    assert "[generated]" in manifest["recipe"]["text"]
    loaded = load_checkpoint(weights)  # weights_only, like every checkpoint
    assert torch.equal(loaded["state_dict"]["head.weight"], payload["state_dict"]["head.weight"])


def test_the_shipped_weights_match_their_manifest():
    from grainwright.models.starting import (
        load_starting_model,
        starting_model_manifest,
        starting_model_path,
        weights_sha256,
    )

    manifest = starting_model_manifest()
    path = starting_model_path()
    assert manifest["weights_sha256"] == hashlib.sha256(path.read_bytes()).hexdigest() == weights_sha256()
    assert path.stat().st_size == manifest["weights_bytes"] <= 4 * 2**20  # at most 4 MB in the package
    payload = load_starting_model()  # weights_only, after the SHA-256 check
    assert payload["architecture"] == manifest["architecture"]["name"] == "unet-noisemap"
    assert payload["hyper"] == manifest["architecture"]["hyper"]
    # The recipe in the manifest is the shipped file it names, and the run completed its budget (every stage).
    assert manifest["recipe"]["text"] == shipped_recipe_text(Path(manifest["recipe"]["file"]).stem)
    assert manifest["steps"] == manifest["recipe"]["resolved"]["budget"]["steps"]
    for stage in manifest.get("earlier_stages", []):
        assert stage["steps"] == stage["resolved"]["budget"]["steps"] and stage["validation_history"]
    assert manifest["validation"]["history"], "the learning curve is recorded"


def shipped_recipe_text(name: str = "starting-model") -> str:
    from grainwright.trainer.config import shipped_config

    return shipped_config(name).read_text()


@pytest.mark.slow
def test_a_built_wheel_carries_the_starting_model(tmp_path):
    # Packaging: `pip wheel` builds the wheel as users install it; the weights and manifest must be inside.
    # Built from a copy of the source tree, so the build leaves nothing in the checkout.
    import shutil
    import subprocess
    import sys
    import zipfile
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    source = tmp_path / "source"
    shutil.copytree(root, source, ignore=shutil.ignore_patterns(".venv", ".git", "build", "dist", "runs",
                                                                 "__pycache__", "*.egg-info", ".hypothesis"))
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q", "-w",
                    str(tmp_path / "wheel"), str(source)], check=True, capture_output=True)
    (wheel,) = (tmp_path / "wheel").glob("grainwright-*.whl")
    names = zipfile.ZipFile(wheel).namelist()
    assert "grainwright/models/starting-model.pt" in names
    assert "grainwright/models/starting-model.json" in names
    manifest = json.loads(zipfile.ZipFile(wheel).read("grainwright/models/starting-model.json"))
    digest = hashlib.sha256(zipfile.ZipFile(wheel).read("grainwright/models/starting-model.pt")).hexdigest()
    assert digest == manifest["weights_sha256"]


def _poisson_gaussian_samples(folder, seed: int = 0):
    """A generated image over 2% to 90% of a 12-bit range under Poisson-Gaussian noise, with its ``noise.toml``."""
    from scipy.ndimage import gaussian_filter

    from grainwright.inference.noise.models import noise_from_dict, save_noise
    from grainwright.inference.synthetic.dead_leaves import DeadLeavesSettings, dead_leaves_image

    rng = np.random.default_rng(seed)
    leaves = dead_leaves_image(rng, DeadLeavesSettings(size=128, radius_min=8.0, radius_max=64.0,
                                                       texture_fraction=0.0, blur_probability=0.0))
    clean = (0.02 + 0.88 * gaussian_filter(leaves.astype(np.float64), 1.0)).astype(np.float32)
    noise = noise_from_dict({"kind": "poisson-gaussian", "gain": 0.004, "read": 0.01})
    noisy = np.clip(np.rint(noise.sample(clean, rng) * 4095.0), 0, 4095).astype(np.uint16)
    folder.mkdir()
    write_image(folder / "frame.tif", noisy[..., None])
    save_noise(noise, folder.parent / "pg.toml")
    return clean * 4095.0, noisy, folder.parent / "pg.toml"


@pytest.mark.parametrize("kind", ["poisson-gaussian", "speckle"])
def test_the_runtime_feeds_transformed_domain_models_their_noise_model_by_default(tmp_path, kind):
    """Signal-dependent noise through a variance-stabilising transform (generalized Anscombe, Makitalo and Foi 2013;
    log for speckle) has a level set by the transform; one level estimated over the whole image (MAD, Donoho and
    Johnstone 1994) misstates it where the signal differs from the image's typical value. The default ('auto')
    feeds the per-pixel map of the noise description, and scores clearly better than the per-image estimate."""
    from grainwright.inference.evaluation.metrics import psnr

    if kind == "speckle":
        clean, noisy, noise_path = _speckle_samples(tmp_path / "samples", 4.0)
        bit_depth = 16
    else:
        clean, noisy, noise_path = _poisson_gaussian_samples(tmp_path / "samples")
        bit_depth = 12
    output = tmp_path / "model.onnx"
    export_starting_model(tmp_path / "samples", output, noise_path=noise_path, bit_depth=bit_depth)
    default = OnnxDenoiser(output, threads=1)
    assert default.noise_sigma == "model" and default.noise_model is not None
    assert read_model_metadata(output)["noise_map"]["source"] == "noise-model"  # the file says so itself
    assert "level from: noise-model" in render_metadata(read_model_metadata(output))
    peak = float(clean.max())
    scores = {mode: psnr(clean, OnnxDenoiser(output, threads=1, noise_sigma=mode).run(noisy[..., None],
                                                                                       as_float=True)[..., 0], peak)
              for mode in ("auto", "estimate")}
    # Measured 34.76 against 32.27 dB (Poisson-Gaussian) and 24.72 against 16.80 dB (4-look speckle).
    assert scores["auto"] > scores["estimate"] + 1.0, scores


def test_gaussian_exports_keep_the_per_image_estimate_by_default(tmp_path):
    """Without a transform the noise is one level per image: 'auto' estimates it (MAD, Donoho and Johnstone 1994)."""
    rng = np.random.default_rng(0)
    (tmp_path / "samples").mkdir()
    write_image(tmp_path / "samples" / "a.png", rng.integers(0, 256, (40, 40, 1), dtype=np.uint8))
    export_starting_model(tmp_path / "samples", tmp_path / "g.onnx", payload=_tiny_starting_payload())
    assert OnnxDenoiser(tmp_path / "g.onnx", threads=1).noise_sigma == "estimate"
    entry = read_model_metadata(tmp_path / "g.onnx")["noise_map"]
    assert entry["source"] == "estimate" and "Donoho and Johnstone" in entry["rule"]


def _rewrite_noise_map(source, target, entry, **changes):
    """A copy of the ONNX file ``source`` whose metadata's ``noise_map`` is ``entry`` (deleted when None), other
    keys set from ``changes``."""
    import onnx

    proto = onnx.load(source)
    stored = next(item for item in proto.metadata_props if item.key == "grainwright")
    metadata = json.loads(stored.value)
    metadata.pop("noise_map")
    if entry is not None:
        metadata["noise_map"] = entry
    metadata.update(changes)
    stored.value = json.dumps(metadata)
    onnx.save(proto, target)
    return target


def test_the_runtime_follows_the_noise_map_source_the_file_states(tmp_path):
    """The file's own ``noise_map.source`` decides what 'auto' feeds; a file without the entry (written before it)
    gets the exporter's rule; a source this version does not know is refused in one line naming the file."""
    from grainwright.inference.common.errors import InputError

    rng = np.random.default_rng(0)
    (tmp_path / "samples").mkdir()
    write_image(tmp_path / "samples" / "a.png", rng.integers(0, 256, (40, 40, 1), dtype=np.uint8))
    exported = tmp_path / "g.onnx"
    export_starting_model(tmp_path / "samples", exported, payload=_tiny_starting_payload())
    stated = _rewrite_noise_map(exported, tmp_path / "stated.onnx", {"source": "noise-model", "rule": "..."},
                                noise={"kind": "gaussian", "sigma": 0.05})
    assert OnnxDenoiser(stated, threads=1).noise_sigma == "model"
    older = _rewrite_noise_map(exported, tmp_path / "older.onnx", None)
    assert OnnxDenoiser(older, threads=1).noise_sigma == "estimate"
    unknown = _rewrite_noise_map(exported, tmp_path / "unknown.onnx", {"source": "lookup-table"})
    with pytest.raises(InputError, match="unknown noise map source 'lookup-table'") as caught:
        OnnxDenoiser(unknown, threads=1)
    assert "unknown.onnx" in str(caught.value) and "\n" not in str(caught.value)
