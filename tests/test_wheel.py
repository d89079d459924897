"""The wheel a plant machine installs: every package is in it, and the torch-free library imports from it alone.

``pyproject.toml`` lists the packages by hand, so a new subpackage left out of it passes every test of an
editable install and is still missing from the wheel. Two checks:

- fast: every folder with an ``__init__.py`` under the mapped top-level folders is a listed package;
- slow: build the wheel (``pip wheel --no-deps``) from a copy of the tracked source, install it with
  ``--no-deps`` into a fresh virtual environment (``python -m venv --without-pip``; the running environment's
  pip installs into it with ``--python``), and, from an empty working folder, import every module of the
  torch-free library and the command layer, check each comes from the new environment, find the shipped
  configs and run ``grainwright --help`` through the installed console script.

How the fresh environment gets its runtime dependencies without a download (the machine may be offline): a
``.pth`` file in its site-packages adds a folder of symbolic links to the running environment's installed
packages, leaving out torch, onnx and tensorboard (the ``train`` extra) and grainwright itself (its editable
hook). So torch is not installed there at all (the child checks ``find_spec("torch") is None``, stronger than
blocking the import), and since a ``.pth`` path goes after the environment's own site-packages and the linked
folder's own ``.pth`` files are not read, grainwright can only come from the wheel. A venv with
``--system-site-packages`` would not do: the base interpreter may have torch.
"""
from __future__ import annotations

import importlib.metadata
import json
import os
import shutil
import site
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text())
PACKAGE_DIRS: dict[str, str] = PYPROJECT["tool"]["setuptools"]["package-dir"]
PACKAGES: list[str] = PYPROJECT["tool"]["setuptools"]["packages"]
# The train extra and grainwright itself stay out of the fresh environment.
LEFT_OUT = ("torch", "onnx", "tensorboard", "tensorboard-data-server")


def _source_packages() -> set[str]:
    found = set()
    for package, folder in PACKAGE_DIRS.items():
        for init in (ROOT / folder).rglob("__init__.py"):
            parts = init.parent.relative_to(ROOT / folder).parts
            found.add(".".join([package, *parts]))
    return found


def test_every_package_folder_is_listed_in_pyproject():
    source = _source_packages()
    missing = sorted(source - set(PACKAGES))
    assert not missing, f"add these to [tool.setuptools] packages in pyproject.toml (else not in the wheel): {missing}"
    listed_without_folder = sorted(set(PACKAGES) - source)
    assert not listed_without_folder, f"listed in pyproject.toml, no folder with __init__.py: {listed_without_folder}"
    assert "grainwright.inference.runtime" in source and "grainwright.configs" in source


def _copy_tracked_source(target: Path) -> Path:
    """The files git tracks (what a clean clone holds), so leftovers in a working copy cannot help the build."""
    listed = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, capture_output=True)
    if listed.returncode != 0:
        pytest.skip("not a git checkout: cannot tell the tracked source files")
    for name in filter(None, listed.stdout.decode().split("\0")):
        source = ROOT / name
        if source.is_file():
            (target / name).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(source, target / name)
    return target


def _dependency_links(target: Path) -> Path:
    """Symbolic links to the running environment's installed packages, without LEFT_OUT and grainwright."""
    left_out = {"grainwright"}
    for name in LEFT_OUT:
        try:
            files = importlib.metadata.distribution(name).files or []
        except importlib.metadata.PackageNotFoundError:
            continue
        left_out |= {file.parts[0] for file in files if file.parts[0] != ".."}
    target.mkdir()
    for folder in site.getsitepackages():
        for entry in Path(folder).iterdir():
            name = entry.name
            if (name in left_out or name.startswith(("grainwright", "__editable__")) or name.endswith(".pth")
                    or name == "__pycache__" or (target / name).exists()):
                continue
            (target / name).symlink_to(entry)
    return target


CHILD = r'''
import importlib, importlib.resources, importlib.util, json, pkgutil, sys
from pathlib import Path
prefix = Path(sys.prefix).resolve()
report = {"torch": importlib.util.find_spec("torch") is not None, "onnx": importlib.util.find_spec("onnx") is not None}
import grainwright.inference, grainwright.console
names = [info.name for package in (grainwright.inference, grainwright.console)
         for info in pkgutil.walk_packages(package.__path__, prefix=package.__name__ + ".")
         if not info.name.endswith("__main__")]
outside = []
for name in names:
    module = importlib.import_module(name)
    if not Path(module.__file__).resolve().is_relative_to(prefix):
        outside.append(f"{name}: {module.__file__}")
report.update(modules=names, outside=outside, torch_loaded="torch" in sys.modules,
              configs=sorted(p.name for p in importlib.resources.files("grainwright.configs").iterdir()
                             if p.name.endswith(".toml")))
print(json.dumps(report))
'''


@pytest.mark.slow
def test_wheel_installs_and_imports_without_torch(tmp_path):
    source = _copy_tracked_source(tmp_path / "source")
    built = subprocess.run([sys.executable, "-m", "pip", "wheel", str(source), "--no-deps", "-q", "-w",
                            str(tmp_path / "wheel")], capture_output=True, text=True, timeout=600)
    assert built.returncode == 0, built.stderr[-2000:]
    [wheel] = (tmp_path / "wheel").glob("grainwright-*.whl")

    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=300)
    python = venv / ("Scripts" if os.name == "nt" else "bin") / "python"
    installed = subprocess.run([sys.executable, "-m", "pip", "--python", str(python), "install", "--no-deps",
                                "--no-index", "-q", str(wheel)], capture_output=True, text=True, timeout=600)
    assert installed.returncode == 0, installed.stderr[-2000:]
    site_packages = subprocess.run([str(python), "-c", "import sysconfig; print(sysconfig.get_path('purelib'))"],
                                   capture_output=True, text=True, check=True).stdout.strip()
    links = _dependency_links(tmp_path / "dependencies")
    (Path(site_packages) / "runtime-dependencies.pth").write_text(f"{links}\n")

    empty = tmp_path / "empty"
    empty.mkdir()
    env = {key: value for key, value in os.environ.items() if key not in ("PYTHONPATH", "PYTHONHOME")}
    child = subprocess.run([str(python), "-c", CHILD], capture_output=True, text=True, cwd=empty, env=env,
                           timeout=600)
    assert child.returncode == 0, child.stderr[-3000:]
    report = json.loads(child.stdout)
    assert not report["torch"] and not report["onnx"] and not report["torch_loaded"]
    assert not report["outside"], f"modules imported from outside the fresh environment: {report['outside']}"
    expected = {name for name in _source_modules()
                if name.startswith(("grainwright.inference.", "grainwright.console."))}
    assert set(report["modules"]) == expected, f"missing from the wheel: {sorted(expected - set(report['modules']))}"
    assert report["configs"] == sorted(path.name for path in (ROOT / "configs").glob("*.toml"))

    script = venv / ("Scripts" if os.name == "nt" else "bin") / "grainwright"
    helped = subprocess.run([str(script), "--help"], capture_output=True, text=True, cwd=empty, env=env, timeout=300)
    assert helped.returncode == 0, helped.stderr[-2000:]
    assert "denoise" in helped.stdout and "train" in helped.stdout


def _source_modules() -> set[str]:
    """Every module of the mapped folders, by its grainwright.* name (``__main__`` modules left out)."""
    names = set()
    for package, folder in PACKAGE_DIRS.items():
        for path in (ROOT / folder).rglob("*.py"):
            parts = path.relative_to(ROOT / folder).with_suffix("").parts
            if parts[-1] == "__main__":
                continue
            names.add(".".join([package, *(p for p in parts if p != "__init__")]))
    return names
