"""``unet-small``: a 2- or 3-level U-Net with residual output, for a large receptive field at low cost.

Each level has two 3x3 conv + ReLU; the encoder halves the resolution with 2x2 max pooling and doubles the
features, the decoder doubles it back with a 2x2 stride-2 up-convolution and concatenates the encoder's features
of the same level. The up-convolution is written as a 1x1 convolution to four times the features followed by a
pixel shuffle (the same linear map as a 2x2 stride-2 transposed convolution), because ONNX Runtime runs that
pair in INT8 while it leaves transposed convolutions in float. A final 1x1 convolution maps back to ``C`` channels; with ``skip=True`` the output is
``input - prediction``. Height and width must be multiples of ``2**levels`` (the ``alignment``): the network
does not pad inside, the runtime pads the image.

Reference: O. Ronneberger, P. Fischer, T. Brox, "U-Net: Convolutional Networks for Biomedical Image
Segmentation", MICCAI 2015 (zero-padded 3x3 convolutions here, so output size equals input size).
"""
from __future__ import annotations

import torch
from torch import nn

from grainwright.models.base import DenoisingNetwork


def _double_conv(in_channels: int, out_channels: int) -> nn.Sequential:
    return nn.Sequential(
        nn.Conv2d(in_channels, out_channels, 3, padding=1),
        nn.ReLU(inplace=True),
        nn.Conv2d(out_channels, out_channels, 3, padding=1),
        nn.ReLU(inplace=True),
    )


class UNetSmallDenoiser(DenoisingNetwork):
    """Small U-Net denoiser.

    Parameters
    ----------
    channels : int
        Image channels in and out.
    levels : int
        Number of 2x downsamplings (2 or 3); the alignment is ``2**levels`` pixels.
    width : int
        Feature channels at full resolution; level ``l`` has ``width * 2**l``.
    skip : bool
        Output ``input - prediction`` (True) or the prediction itself (False, for blind-spot training).
    """

    name = "unet-small"

    def __init__(self, channels: int, levels: int = 3, width: int = 24, skip: bool = True):
        super().__init__(channels, levels=int(levels), width=int(width), skip=bool(skip))
        if self.hyper["levels"] not in (2, 3):
            raise ValueError(f"levels must be 2 or 3, got {levels}")
        if self.hyper["width"] < 1:
            raise ValueError(f"width must be >= 1, got {width}")
        self.skip = bool(skip)
        widths = [self.hyper["width"] * 2**level for level in range(self.hyper["levels"] + 1)]
        self.encoders = nn.ModuleList()
        previous = self._stack_inputs()
        for level in range(self.hyper["levels"]):
            self.encoders.append(_double_conv(previous, widths[level]))
            previous = widths[level]
        self.pool = nn.MaxPool2d(2)
        self.bottom = _double_conv(widths[-2], widths[-1])
        self.ups = nn.ModuleList()
        self.decoders = nn.ModuleList()
        for level in reversed(range(self.hyper["levels"])):
            self.ups.append(nn.Sequential(nn.Conv2d(widths[level + 1], 4 * widths[level], 1), nn.PixelShuffle(2)))
            self.decoders.append(_double_conv(2 * widths[level], widths[level]))
        self.head = nn.Conv2d(widths[0], channels, 1)
        self._widths = widths

    def _stack_inputs(self) -> int:
        """Input planes of the first convolution: the image channels (a subclass may add more)."""
        return self.channels

    def forward(self, image: torch.Tensor, noise_sigma: torch.Tensor | None = None) -> torch.Tensor:
        prediction = self.predict(image)
        return image - prediction if self.skip else prediction

    def predict(self, inputs: torch.Tensor) -> torch.Tensor:
        """The U-Net itself, without the input-to-output skip, on the input planes (``_stack_inputs`` of them)."""
        features = inputs
        skips = []
        for encoder in self.encoders:
            features = encoder(features)
            skips.append(features)
            features = self.pool(features)
        features = self.bottom(features)
        for up, decoder in zip(self.ups, self.decoders):
            features = decoder(torch.cat([skips.pop(), up(features)], dim=1))
        return self.head(features)

    @property
    def alignment(self) -> int:
        return 2 ** self.hyper["levels"]

    def macs_per_pixel(self) -> float:
        return self._macs(self._stack_inputs(), self.channels)

    def _macs(self, inputs: int, outputs: int) -> float:
        """Multiply-accumulates per pixel with ``inputs`` planes into the first convolution, ``outputs`` out."""
        widths, levels = self._widths, self.hyper["levels"]
        total = 0.0
        previous = inputs
        for level in range(levels):  # encoder: two 3x3 convolutions at 1 / 4**level of the pixels
            total += 9 * (previous * widths[level] + widths[level] ** 2) / 4**level
            previous = widths[level]
        total += 9 * (widths[-2] * widths[-1] + widths[-1] ** 2) / 4**levels
        for level in range(levels):  # decoder: the 1x1 up-convolution costs w_in * 4 w_out per pixel of level + 1
            total += (widths[level + 1] * widths[level] + 9 * (2 * widths[level] * widths[level] + widths[level] ** 2)) / 4**level
        total += widths[0] * outputs
        return total

    @property
    def receptive_field(self) -> int:
        # Interval arithmetic backwards from one output pixel; the reach depends on the pixel's position on the
        # pooling grid, so take the widest over one alignment period.
        radius = 0
        for position in range(self.alignment):
            low, high = self._input_interval(0, position, position)
            radius = max(radius, position - low, high - position)
        return 2 * radius + 1

    def _input_interval(self, level: int, low: int, high: int) -> tuple[int, int]:
        """Input pixels (at ``level``) reaching output pixels ``low..high`` of the sub-network at ``level``."""
        if level == self.hyper["levels"]:
            return low - 2, high + 2  # two 3x3 convolutions
        low, high = low - 2, high + 2  # decoder convolutions
        deep_low, deep_high = self._input_interval(level + 1, low // 2, high // 2)  # pixel shuffle, then deeper
        low, high = min(low, 2 * deep_low), max(high, 2 * deep_high + 1)  # max pooling reads 2x2 cells
        return low - 2, high + 2  # encoder convolutions
