"""``residual``: a plain stack of 3x3 convolutions that predicts the noise (DnCNN).

The network sees the noisy image ``y`` and predicts the noise ``v``; the output is ``y - v`` (residual
learning). Layer 1 is conv + ReLU, layers 2 .. depth-1 are conv (+ batch norm) + ReLU, the last layer is a
conv back to ``C`` channels. With ``skip=False`` the stack predicts the clean image directly, which masked
blind-spot training needs (the skip would hand each pixel its own noisy value).

Reference: K. Zhang, W. Zuo, Y. Chen, D. Meng, L. Zhang, "Beyond a Gaussian Denoiser: Residual Learning of Deep
CNN for Image Denoising", IEEE Transactions on Image Processing 26(7), 2017 (17 x 64 there; 10 x 48 here, sized
for a CPU).
"""
from __future__ import annotations

import copy

import torch
from torch import nn

from grainwright.models.base import DenoisingNetwork


def conv_stack(in_channels: int, out_channels: int, depth: int, width: int, batch_norm: bool) -> nn.Sequential:
    """``depth`` 3x3 convolutions with zero padding: conv+ReLU, (conv+BN+ReLU) x (depth-2), conv."""
    if depth < 2:
        raise ValueError(f"depth must be >= 2, got {depth}")
    if width < 1:
        raise ValueError(f"width must be >= 1, got {width}")
    layers: list[nn.Module] = [nn.Conv2d(in_channels, width, 3, padding=1), nn.ReLU(inplace=True)]
    for _ in range(depth - 2):
        # The batch norm's shift makes the convolution's own bias redundant.
        layers.append(nn.Conv2d(width, width, 3, padding=1, bias=not batch_norm))
        if batch_norm:
            layers.append(nn.BatchNorm2d(width))
        layers.append(nn.ReLU(inplace=True))
    layers.append(nn.Conv2d(width, out_channels, 3, padding=1))
    return nn.Sequential(*layers)


def fold_batch_norm(stack: nn.Sequential) -> nn.Sequential:
    """Fold each BatchNorm2d into the convolution before it, using the running statistics.

    ``BN(W x + b) = g (W x + b - mean) / sqrt(var + eps) + beta``, so the folded convolution has weights
    ``W g / s`` and bias ``(b - mean) g / s + beta`` per output channel, with ``s = sqrt(var + eps)``.
    """
    folded: list[nn.Module] = []
    for module in stack:
        if isinstance(module, nn.BatchNorm2d):
            conv = folded[-1]
            assert isinstance(conv, nn.Conv2d), "batch norm must follow a convolution"
            scale = module.weight / torch.sqrt(module.running_var + module.eps)
            bias = conv.bias if conv.bias is not None else torch.zeros_like(module.running_mean)
            fused = nn.Conv2d(conv.in_channels, conv.out_channels, conv.kernel_size, padding=conv.padding)
            with torch.no_grad():
                fused.weight.copy_(conv.weight * scale.reshape(-1, 1, 1, 1))
                fused.bias.copy_((bias - module.running_mean) * scale + module.bias)
            folded[-1] = fused
        else:
            folded.append(copy.deepcopy(module))
    return nn.Sequential(*folded)


def conv_stack_macs(in_channels: int, out_channels: int, depth: int, width: int) -> int:
    """Multiply-accumulates per pixel of :func:`conv_stack` (3x3 kernels, every layer at full resolution)."""
    return 9 * (in_channels * width + (depth - 2) * width * width + width * out_channels)


class ResidualDenoiser(DenoisingNetwork):
    """DnCNN-style residual CNN.

    Parameters
    ----------
    channels : int
        Image channels in and out.
    depth : int
        Number of 3x3 convolution layers (receptive field ``2 * depth + 1`` pixels).
    width : int
        Feature channels of the hidden layers.
    batch_norm : bool
        Batch norm after the hidden convolutions (folded into them at export).
    skip : bool
        Output ``input - prediction`` (True) or the prediction itself (False, for blind-spot training).
    """

    name = "residual"

    def __init__(self, channels: int, depth: int = 10, width: int = 48, batch_norm: bool = False, skip: bool = True):
        super().__init__(channels, depth=int(depth), width=int(width), batch_norm=bool(batch_norm), skip=bool(skip))
        self.skip = bool(skip)
        self.body = conv_stack(self._stack_inputs(), channels, int(depth), int(width), bool(batch_norm))

    def _stack_inputs(self) -> int:
        return self.channels

    def forward(self, image: torch.Tensor, noise_sigma: torch.Tensor | None = None) -> torch.Tensor:
        prediction = self.body(image)
        return image - prediction if self.skip else prediction

    def macs_per_pixel(self) -> int:
        return conv_stack_macs(self._stack_inputs(), self.channels, self.hyper["depth"], self.hyper["width"])

    @property
    def receptive_field(self) -> int:
        return 2 * self.hyper["depth"] + 1

    def for_export(self) -> "ResidualDenoiser":
        if not self.hyper["batch_norm"]:
            return self
        exported = copy.deepcopy(self).eval()
        exported.body = fold_batch_norm(self.body)
        return exported
