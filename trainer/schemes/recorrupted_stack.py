"""``recorrupted-stack``: Recorrupted-to-Recorrupted on K-frame windows, at full resolution; every pixel in the
loss, valid for moving scenes, for noise independent between frames.

Recorrupted-to-Recorrupted (T. Pang, H. Zheng, Y. Quan, H. Ji, "Recorrupted-to-Recorrupted: Unsupervised Deep
Learning for Image Denoising", CVPR 2021): for Gaussian noise ``n`` of standard deviation sigma, draw
``z ~ N(0, sigma^2)`` and train ``f(y + alpha z)`` towards ``y - z / alpha``. Input and target noise are then
uncorrelated (covariance ``sigma^2 - sigma^2 = 0``), so for Gaussian noise they are independent and the minimiser
is the clean image's conditional mean given the recorrupted input. Here ``y`` is a window of K consecutive frames:
every frame of the window gets its own draw ``z_k``, and the target is the **centre** frame ``y_c - z_c / alpha``.
The target is the centre frame itself, so the scheme does not assume a still scene, and unlike
Neighbor2Neighbor's 2x sub-sampling (``neighbor2neighbor-stack``) it trains at full resolution on consecutive
frames, with the motion the model meets at run time.

No identity shortcut, and where it needs the noise to be independent between frames. The target noise is
``n_c - z_c / alpha``. The centre frame's input noise ``n_c + alpha z_c`` is uncorrelated with it by the
construction above; a neighbour's input noise ``n_k + alpha z_k`` is uncorrelated with it only when ``n_k`` is
uncorrelated with ``n_c``. Noise correlated between frames (CT slices, whose reconstruction spreads noise across
slices; fixed-pattern noise or banding repeated in every frame) would reach the input through the neighbours and
be copied. The trainer therefore measures the correlation of the noise between neighbouring frames of the
training windows after the row/column correction
(:func:`grainwright.inference.noise.estimation.interframe_noise_correlation`) and refuses this scheme above
``recorrupted.max_frame_correlation``, pointing to ``neighbor2neighbor-stack``, whose input never holds a
target position in any frame (``tests/test_stack_training.py`` trains on pure-noise stacks of both kinds).

Noise must be Gaussian in the working domain (Poisson-Gaussian data go through the generalized Anscombe
transform, as for the single-frame ``recorrupted``), of known or confidently estimated level. The network learns
noise ``sqrt(1 + alpha^2)`` times the real level (``recorrupted.alpha``, as for ``recorrupted``). Its default
(``auto``) is 1.0, not the single-frame 0.3: the K-frame model can average the input's extra noise down over the
window, so it pays less for noisier inputs and gains more from cleaner targets (noise ``sigma / alpha``); at fixed
steps on the generated sequence 1.0 beat 0.5 by 0.5 dB and 0.3 by 1.2 dB (docs/benchmarks.md).

Each training sample holds two windows of the same stack K frames apart (``noisy`` and ``noisy_b``); one of them
is drawn per patch, so every frame serves as a centre.
"""
from __future__ import annotations

from typing import Any

import numpy as np
import torch

from grainwright.inference.common.errors import ConfigError
from grainwright.inference.noise.estimation import interframe_noise_correlation
from grainwright.trainer.schemes.base import Scheme, apply_model

MEASURED_PAIRS = 16  # frame pairs per offset whose noise correlation is measured (the median is taken)


class RecorruptedStack(Scheme):
    name = "recorrupted-stack"
    layouts = ("noisy-stacks",)
    multi_frame = True
    needs_noise_level = True
    forward_passes_per_pixel = 3.0
    default_alpha = 1.0  # measured best of 0.3 / 0.5 / 1.0 for a K = 5 model (docs/benchmarks.md)

    @classmethod
    def check_data(cls, config: dict[str, Any], noisy: list[np.ndarray], frames: int, banding_left: bool
                   ) -> dict[str, Any]:
        """Refuse noise that the neighbours would hand to the network: banding left in the frames (not white, so
        the recorruption does not decorrelate it even in the centre frame) or noise correlated between frames
        above ``recorrupted.max_frame_correlation`` (:func:`frame_noise_correlation` of the stacks ``noisy``,
        each ``(N, H, W, C)``)."""
        if banding_left:
            raise ConfigError("scheme 'recorrupted-stack': the noise analysis flags banding and the row/column "
                              "correction is off (data.fixed_pattern); banding repeated along rows reaches the "
                              "network through its target's own row: use neighbor2neighbor-stack, or correct it")
        correlation = frame_noise_correlation(noisy, frames)
        limit = config["recorrupted"]["max_frame_correlation"]
        if correlation > limit:
            raise ConfigError(f"scheme 'recorrupted-stack': the noise of neighbouring frames is correlated "
                              f"{correlation:.2f} (recorrupted.max_frame_correlation = {limit:g}); the network would "
                              "see its target's noise through the neighbours: use neighbor2neighbor-stack, which "
                              "never shows it a target position in any frame")
        return {"frame_noise_correlation": correlation}

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        n, channels = patches["noisy"].shape[:2]
        other = (rng.random(n) < 0.5)[:, None, None, None]
        window = np.where(other, patches["noisy_b"], patches["noisy"])
        alpha = self.alpha_for(self.config)
        frame_channels = self.sigma.shape[1]
        sigma = np.tile(self.sigma, (1, channels // frame_channels, 1, 1))  # frame-major: the same per frame
        z = rng.standard_normal(window.shape, dtype=np.float32) * sigma
        frames = channels // frame_channels
        first = (frames // 2) * frame_channels
        target = window[:, first:first + frame_channels] - z[:, first:first + frame_channels] / alpha
        return {"noisy": window, "input": window + alpha * z, "target": target}

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        return torch.mean((apply_model(model, batch["input"]) - batch["target"]) ** 2)



def frame_noise_correlation(stacks: list[np.ndarray], frames: int) -> float:
    """The largest correlation of the noise of a frame with that of a frame up to ``frames // 2`` further along
    its stack (the offsets of a ``frames``-frame window's frames from its centre): per offset, the median over up
    to ``MEASURED_PAIRS`` frame pairs spread over the stacks ``(N, H, W, C)``."""
    per_offset = []
    for offset in range(1, frames // 2 + 1):
        pairs = [(stack, index) for stack in stacks for index in range(stack.shape[0] - offset)]
        step = max(1, len(pairs) // MEASURED_PAIRS)
        per_offset.append(np.median([interframe_noise_correlation(stack[index], stack[index + offset])
                                     for stack, index in pairs[::step][:MEASURED_PAIRS]]))
    return float(max(per_offset))
