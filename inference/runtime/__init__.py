"""The plant-machine runtime: tiling, model metadata, the ONNX Runtime denoiser, the batch over files."""
