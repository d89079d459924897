"""grainwright's torch half, part one: denoising architectures by name, checkpoints and ONNX export."""
