"""``residual-noisemap``: the residual CNN with an extra input plane holding the noise level per pixel.

The noise level map ``M`` (standard deviation, working units, ``(N, 1, H, W)``) is concatenated to the image as
one more input channel, so one network covers a range of noise levels, the level may vary over the image
(signal-dependent noise: ``sigma(x) = sqrt(gain * x + read**2)``), and scaling ``M`` turns the strength up or down
at inference. The network otherwise matches ``residual``; here it runs at full resolution (no pixel-unshuffle).

Reference: K. Zhang, W. Zuo, L. Zhang, "FFDNet: Toward a Fast and Flexible Solution for CNN-Based Image
Denoising", IEEE Transactions on Image Processing 27(9), 2018 (noise level map as input).
"""
from __future__ import annotations

import torch

from grainwright.models.residual import ResidualDenoiser


class ResidualNoiseMapDenoiser(ResidualDenoiser):
    """Residual CNN conditioned on a per-pixel noise level map.

    Parameters are those of :class:`~grainwright.models.residual.ResidualDenoiser`; ``forward`` also takes
    ``noise_sigma``, the noise standard deviation per pixel in working units, shaped ``(N, 1, H, W)``.
    """

    name = "residual-noisemap"
    takes_noise_map = True

    def _stack_inputs(self) -> int:
        return self.channels + 1

    def forward(self, image: torch.Tensor, noise_sigma: torch.Tensor | None = None) -> torch.Tensor:
        if noise_sigma is None:
            raise ValueError("residual-noisemap needs a noise_sigma map shaped (N, 1, H, W)")
        noise_sigma = noise_sigma.expand(image.shape[0], 1, image.shape[2], image.shape[3])
        prediction = self.body(torch.cat([image, noise_sigma], dim=1))
        return image - prediction if self.skip else prediction
