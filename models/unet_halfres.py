"""``unet-halfres``: the small U-Net run on the four half-resolution sub-images of each 2x2 cell.

The image is rearranged losslessly (pixel unshuffle) into ``4 C`` channels at half the height and width, a
:class:`~grainwright.models.unet_small.UNetSmallDenoiser` without its own skip maps them to a ``4 C``-channel
prediction, and a pixel shuffle puts it back at full resolution; with ``skip=True`` the output is
``input - prediction``. Every convolution runs on a quarter of the pixels, so for the cost of a ``unet-small`` of
width ``w`` it can be twice as wide and reach twice as far; wide convolutions also keep the CPU's matrix units
busier (measured by ``grainwright bench`` style step timings; see docs/benchmarks.md).

Reference: the downsampled sub-image input of K. Zhang, W. Zuo, L. Zhang, "FFDNet: Toward a Fast and Flexible
Solution for CNN-Based Image Denoising", IEEE TIP 2018, with the U-Net of O. Ronneberger, P. Fischer, T. Brox,
MICCAI 2015.
"""
from __future__ import annotations

import torch
from torch import nn

from grainwright.models.base import DenoisingNetwork
from grainwright.models.unet_small import UNetSmallDenoiser


class UNetHalfResDenoiser(DenoisingNetwork):
    """U-Net on 2x2 pixel-unshuffled input.

    Parameters
    ----------
    channels : int
        Image channels in and out.
    levels : int
        Number of 2x downsamplings inside the U-Net (2 or 3); the alignment is ``2**(levels + 1)`` pixels.
    width : int
        Feature channels at half resolution; U-Net level ``l`` has ``width * 2**l``.
    skip : bool
        Output ``input - prediction`` (True) or the prediction itself (False, for blind-spot training).
    """

    name = "unet-halfres"

    def __init__(self, channels: int, levels: int = 2, width: int = 48, skip: bool = True):
        super().__init__(channels, levels=int(levels), width=int(width), skip=bool(skip))
        self.skip = bool(skip)
        self.inner = UNetSmallDenoiser(4 * channels, levels=levels, width=width, skip=False)
        self.unshuffle = nn.PixelUnshuffle(2)
        self.shuffle = nn.PixelShuffle(2)

    def forward(self, image: torch.Tensor, noise_sigma: torch.Tensor | None = None) -> torch.Tensor:
        prediction = self.shuffle(self.inner(self.unshuffle(image)))
        return image - prediction if self.skip else prediction

    @property
    def alignment(self) -> int:
        return 2 * self.inner.alignment

    def macs_per_pixel(self) -> float:
        return self.inner.macs_per_pixel() / 4  # per half-resolution pixel, four full-resolution pixels

    @property
    def receptive_field(self) -> int:
        # A half-resolution reach of r cells spans 2 r + 1 full-resolution pixels from either pixel of a cell.
        return 2 * (2 * self.inner.receptive_radius + 1) + 1
