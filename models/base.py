"""What every denoising architecture shares: its size figures, its receptive field and its alignment.

An architecture is an ``nn.Module`` working in the float32 working range on ``(N, C, H, W)``. It takes ``C``
channels and returns ``C`` (a multi-frame architecture takes ``K * C``, K consecutive frames, and returns the
centre frame's ``C``). A subclass sets ``name``, keeps the hyper-parameters it was built with in
``self.hyper`` (so a checkpoint can rebuild it) and implements ``macs_per_pixel`` and ``receptive_field``.
"""
from __future__ import annotations

from typing import Any

import torch
from torch import nn


class DenoisingNetwork(nn.Module):
    """Base class of the registered architectures.

    Attributes
    ----------
    name : str
        Registry name, e.g. ``"residual"``.
    takes_noise_map : bool
        True when ``forward`` needs a per-pixel noise level (working units, ``(N, 1, H, W)``).
    channels : int
        Image channels in and out.
    hyper : dict
        Hyper-parameters (keyword arguments of the constructor besides ``channels``).
    """

    name: str = ""
    takes_noise_map: bool = False
    # Consecutive frames (slices) the network reads per output frame; multi-frame architectures set it > 1.
    stack_frames: int = 1

    def __init__(self, channels: int, **hyper: Any):
        super().__init__()
        if int(channels) < 1:
            raise ValueError(f"channels must be >= 1, got {channels}")
        self.channels = int(channels)
        self.hyper = dict(hyper)

    @property
    def input_channels(self) -> int:
        """Channels of the input tensor: ``channels`` per frame, frames in order (frame-major)."""
        return self.channels * self.stack_frames

    def forward(self, image: torch.Tensor, noise_sigma: torch.Tensor | None = None) -> torch.Tensor:
        raise NotImplementedError

    def parameter_count(self) -> int:
        """Number of trainable weights and biases."""
        return sum(p.numel() for p in self.parameters() if p.requires_grad)

    def macs_per_pixel(self) -> float:
        """Multiply-accumulates per output pixel (convolutions only; activations, pooling and biases are free)."""
        raise NotImplementedError

    @property
    def receptive_field(self) -> int:
        """Edge in pixels (odd) of the square of input pixels that can change one output pixel."""
        raise NotImplementedError

    @property
    def receptive_radius(self) -> int:
        return (self.receptive_field - 1) // 2

    @property
    def alignment(self) -> int:
        """Height and width of the input must be multiples of this; the runtime pads (reflect) to it."""
        return 1

    @property
    def tile_margin(self) -> int:
        """Overlap kept around each tile: the receptive-field radius rounded up to the alignment."""
        return -(-self.receptive_radius // self.alignment) * self.alignment

    def for_export(self) -> "DenoisingNetwork":
        """An equivalent module for inference-only graphs (e.g. with batch norm folded). Default: ``self``."""
        return self

    def describe(self) -> dict[str, Any]:
        """Name, hyper-parameters and size figures, JSON-serialisable."""
        return {
            "name": self.name,
            "hyper": dict(self.hyper),
            "channels": self.channels,
            "parameters": self.parameter_count(),
            "macs_per_pixel": self.macs_per_pixel(),
            "receptive_field": self.receptive_field,
            "alignment": self.alignment,
            "tile_margin": self.tile_margin,
            "takes_noise_map": self.takes_noise_map,
            "stack_frames": self.stack_frames,
        }
