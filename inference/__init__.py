"""grainwright's torch-free half: image I/O, noise, metrics, tiling, the ONNX runner, baselines, reports.

Nothing under ``grainwright.inference`` may import torch: this is what a plant machine installs.
"""
from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("grainwright")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0.0.0+source"
