"""Noise: noise models by name, estimation from images, and the analysis behind ``inspect``."""
