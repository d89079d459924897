"""``unet-stack``: the ``unet-small`` U-Net reading K consecutive frames (or slices) and returning the centre one.

The K frames of a window enter as input channels, frame-major (channel ``k * C + c`` is frame ``k``, channel
``c``; K odd, the centre frame is ``k = K // 2``). Only the first convolution sees more than one frame, so the
cost per output pixel grows by ``9 * (K - 1) * C * width`` multiply-accumulates over the single-frame U-Net of
the same width (about 2 % for K = 5 at the default width). With ``skip=True`` the output is the centre frame
minus the prediction: where the scene holds still the network can average along the stack, where it moves it
can fall back on the centre frame's own neighbourhood.

Receptive field: the U-Net's in x and y (``receptive_field``), K frames along the stack
(``stack_receptive_field``). Multi-channel stacks (e.g. RGB sequences) take ``K * C`` input channels and return
``C``; the network mixes channels and frames from its first layer on, like the single-frame models mix channels.

Reference for the backbone: O. Ronneberger, P. Fischer, T. Brox, "U-Net: Convolutional Networks for Biomedical
Image Segmentation", MICCAI 2015. Feeding neighbouring frames as input channels to a 2-D network follows
M. Tassano, J. Delon, T. Veit, "FastDVDnet: Towards Real-Time Deep Video Denoising Without Flow Estimation",
CVPR 2020 (its denoising blocks take 3 frames as channels).
"""
from __future__ import annotations

import torch
from torch import nn

from grainwright.models.unet_small import UNetSmallDenoiser


class StackUNetDenoiser(UNetSmallDenoiser):
    """Small U-Net denoiser over a window of K consecutive frames.

    Parameters
    ----------
    channels : int
        Image channels per frame, in and out.
    frames : int
        K, the frames per window (odd, 3 to 15); the output is the centre frame.
    levels : int
        Number of 2x downsamplings (2 or 3); the alignment is ``2**levels`` pixels.
    width : int
        Feature channels at full resolution; level ``l`` has ``width * 2**l``.
    skip : bool
        Output ``centre frame - prediction`` (True) or the prediction itself (False, for blind-spot training).
    """

    name = "unet-stack"

    def __init__(self, channels: int, frames: int = 5, levels: int = 3, width: int = 24, skip: bool = True):
        if int(frames) != frames or not 3 <= int(frames) <= 15 or int(frames) % 2 == 0:
            raise ValueError(f"frames must be odd, from 3 to 15, got {frames}")
        super().__init__(channels, levels=levels, width=width, skip=skip)
        self.hyper = {"frames": int(frames), **self.hyper}
        self.stack_frames = int(frames)
        # The first convolution is the only one that sees the neighbouring frames.
        self.encoders[0][0] = nn.Conv2d(self.input_channels, self.hyper["width"], 3, padding=1)

    @property
    def centre(self) -> slice:
        """Input channels of the centre frame."""
        first = (self.stack_frames // 2) * self.channels
        return slice(first, first + self.channels)

    def forward(self, image: torch.Tensor, noise_sigma: torch.Tensor | None = None) -> torch.Tensor:
        prediction = self.predict(image)
        return image[:, self.centre] - prediction if self.skip else prediction

    def load_single_frame(self, state_dict: dict[str, torch.Tensor]) -> None:
        """Start from the weights of a single-frame ``unet-small`` of the same channels, levels and width: every
        layer as it is, the first convolution's weights on the centre frame's channels, zero on the neighbours'.
        The model then computes exactly what the single-frame model computes on the centre frame, and training
        can only add what the neighbours contribute (the inflation of 2-D weights into a wider input, as in
        J. Carreira, A. Zisserman, "Quo Vadis, Action Recognition?", CVPR 2017, but with the weight on the centre
        frame alone instead of spread over the frames). Raises ``ValueError`` when the shapes do not fit."""
        first = "encoders.0.0.weight"
        inflated = dict(state_dict)
        single = state_dict[first]
        wanted = self.encoders[0][0].weight.shape
        if single.shape != (wanted[0], self.channels, *wanted[2:]):
            raise ValueError(f"first convolution {tuple(single.shape)} does not fit {tuple(wanted)} by frames")
        weight = torch.zeros(wanted, dtype=single.dtype)
        weight[:, self.centre] = single
        inflated[first] = weight
        self.load_state_dict(inflated)

    def macs_per_pixel(self) -> float:
        return super().macs_per_pixel() + 9 * (self.input_channels - self.channels) * self.hyper["width"]

    @property
    def stack_receptive_field(self) -> int:
        """Frames (slices) along the stack that can change one output pixel: the window, K."""
        return self.stack_frames

    def describe(self) -> dict:
        return {**super().describe(), "stack_receptive_field": self.stack_receptive_field}
