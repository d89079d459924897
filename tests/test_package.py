"""The package shape: one grainwright.* namespace, a torch-free runtime half, one console command."""
from __future__ import annotations

import pkgutil
import subprocess
import sys

from no_torch import BLOCK_TORCH

import grainwright.console
import grainwright.inference


def _torch_free_modules() -> list[str]:
    """The library, and the command layer, which loads the torch half only inside a command's ``run``."""
    return [
        info.name
        for package in (grainwright.inference, grainwright.console)
        for info in pkgutil.walk_packages(package.__path__, prefix=package.__name__ + ".")
        if not info.name.endswith("__main__")
    ]


def test_every_library_and_command_module_imports_with_torch_blocked():
    modules = _torch_free_modules()
    assert "grainwright.console.cli" in modules and "grainwright.inference.runtime.runner" in modules
    script = BLOCK_TORCH + "".join(f"import {name}\n" for name in modules) + "print('ok')\n"
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "ok"


def test_blocking_works_at_all():
    # The block above is only a proof if importing torch really fails under it.
    result = subprocess.run([sys.executable, "-c", BLOCK_TORCH + "import torch"], capture_output=True, text=True)
    assert result.returncode != 0


def test_no_bare_top_level_packages_installed(tmp_path):
    # Run from an empty folder: from the repository root the source folders themselves would be importable.
    script = (
        "import importlib.util\n"
        "bare = [n for n in ('models', 'trainer', 'inference', 'configs', 'console', 'benchmarks') if importlib.util.find_spec(n)]\n"
        "print(','.join(bare))\n"
    )
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "", f"installed as bare packages: {result.stdout.strip()}"


def test_help_lists_every_command_without_torch():
    script = BLOCK_TORCH + "from grainwright.console.cli import main\nmain(['--help'])\n"
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    for command in ("inspect", "train", "export", "info", "denoise", "compare", "demo", "bench"):
        assert command in result.stdout


def test_torch_command_without_torch_gives_clear_message(tmp_path):
    script = BLOCK_TORCH + (
        "from grainwright.console.cli import main\n"
        f"sys.exit(main(['train', '--data', {str(tmp_path)!r}]))\n"
    )
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert result.returncode != 0
    assert "needs PyTorch" in result.stderr
