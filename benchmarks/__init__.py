"""Benchmarks and research runs behind ``grainwright bench``; they sit above the trainer and the library."""
