"""``unet-noisemap``: the small U-Net with an extra input plane holding the noise level per pixel.

The noise level map ``M`` (standard deviation, working units, ``(N, 1, H, W)``) is concatenated to the image as
one more input plane of the first convolution, so one network covers a range of noise levels, the level may vary
over the image, and scaling ``M`` turns the strength up or down at inference. Otherwise the network is
``unet-small`` (same levels, widths, pooling and up-convolutions); the map adds ``9 * width`` multiply-accumulates
per pixel. With ``per_channel=True`` one grayscale network (the same weights) denoises each channel of a
multi-channel image separately, with the same noise map: that is how the grayscale starting model
(``grainwright.models.starting``) serves colour and multi-band data.

References: K. Zhang, W. Zuo, L. Zhang, "FFDNet: Toward a Fast and Flexible Solution for CNN-Based Image
Denoising", IEEE Transactions on Image Processing 27(9), 2018 (noise level map as input); O. Ronneberger,
P. Fischer, T. Brox, "U-Net: Convolutional Networks for Biomedical Image Segmentation", MICCAI 2015.
"""
from __future__ import annotations

import torch

from grainwright.models.unet_small import UNetSmallDenoiser


class UNetNoiseMapDenoiser(UNetSmallDenoiser):
    """Small U-Net conditioned on a per-pixel noise level map.

    Parameters
    ----------
    channels : int
        Image channels in and out.
    levels, width, skip
        As for :class:`~grainwright.models.unet_small.UNetSmallDenoiser` (here 2 levels by default).
    per_channel : bool
        Denoise each channel on its own with one grayscale network (weights of a 1-channel model); False: all
        channels enter the network together.

    ``forward`` also takes ``noise_sigma``, the noise standard deviation per pixel in working units, shaped
    ``(N, 1, H, W)`` (or ``(N, 1, 1, 1)``, broadcast).
    """

    name = "unet-noisemap"
    takes_noise_map = True

    def __init__(self, channels: int, levels: int = 2, width: int = 24, skip: bool = True, per_channel: bool = False):
        self._per_channel = bool(per_channel)
        super().__init__(1 if per_channel else channels, levels=levels, width=width, skip=skip)
        self.channels = int(channels)
        self.hyper["per_channel"] = self._per_channel

    def _stack_inputs(self) -> int:
        return (1 if self._per_channel else self.channels) + 1

    def forward(self, image: torch.Tensor, noise_sigma: torch.Tensor | None = None) -> torch.Tensor:
        if noise_sigma is None:
            raise ValueError("unet-noisemap needs a noise_sigma map shaped (N, 1, H, W)")
        batch, channels, height, width = image.shape
        noise_sigma = noise_sigma.expand(batch, 1, height, width)
        if self._per_channel:  # channels into the batch, each with the same map
            planes = image.reshape(batch * channels, 1, height, width)
            maps = noise_sigma.expand(batch, channels, height, width).reshape(batch * channels, 1, height, width)
            prediction = self.predict(torch.cat([planes, maps], dim=1)).reshape(batch, channels, height, width)
        else:
            prediction = self.predict(torch.cat([image, noise_sigma], dim=1))
        return image - prediction if self.skip else prediction

    def macs_per_pixel(self) -> float:
        if self._per_channel:
            return self.channels * self._macs(2, 1)
        return self._macs(self._stack_inputs(), self.channels)
