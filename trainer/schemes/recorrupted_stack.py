"""``recorrupted-stack``: Recorrupted-to-Recorrupted on K-frame windows, at full resolution; every pixel in the
loss, valid for moving scenes, for noise independent between frames or correlated between them.

Recorrupted-to-Recorrupted (T. Pang, H. Zheng, Y. Quan, H. Ji, "Recorrupted-to-Recorrupted: Unsupervised Deep
Learning for Image Denoising", CVPR 2021): for Gaussian noise ``n`` of covariance ``Sigma``, draw
``z ~ N(0, Sigma)`` and train ``f(y + alpha z)`` towards ``y - z / alpha``. Input and target noise are then
uncorrelated (cross-covariance ``Sigma - Sigma = 0``), so for Gaussian noise they are independent and the
minimiser is the clean image's conditional mean given the recorrupted input (the paper states it for a general
covariance; recalled from memory, not checked against the text here). Here ``y`` is a window of K consecutive
frames and the target is the **centre** frame ``y_c - z_c / alpha``. The target is the centre frame itself, so
the scheme does not assume a still scene, and unlike Neighbor2Neighbor's 2x sub-sampling
(``neighbor2neighbor-stack``) it trains at full resolution on consecutive frames, with the motion the model meets
at run time.

No identity shortcut, also where the noise is correlated between frames. Each pixel's noise along the window,
``n_1 .. n_K``, has covariance ``sigma^2 R`` with ``R`` the frames' correlation matrix (Toeplitz for a stationary
stack: ``R[j, k] = rho(|j - k|)``; CT slices, whose reconstruction spreads noise across slices, or a white pixel
pattern repeated in every frame). Every pixel's K recorruption values are drawn together with that covariance,
``z = sigma S w`` with ``S S^T = R`` and ``w`` standard normal, so the input noise of any frame ``k``,
``n_k + alpha z_k``, and the target noise ``n_c - z_c / alpha`` have covariance
``sigma^2 (R[k, c] - R[k, c]) = 0``: the neighbours hold nothing of the target's noise that the network could
copy. With independent draws per frame (``R`` = identity) the neighbour ``k`` would keep ``rho(|k - c|) sigma^2``
of it. ``R`` comes from the data: :func:`frame_noise_correlations` measures ``rho(d)`` for the offsets
``d = 1 .. K - 1`` on the training stacks after the transform and the row/column correction (the median over frame
pairs of :func:`grainwright.inference.noise.estimation.interframe_noise_correlation`), :func:`correlation_matrix`
builds the Toeplitz matrix and makes it positive semi-definite (eigenvalues clipped at 0, unit diagonal
restored). What remains is the estimator's error: the input of neighbour ``k`` keeps
``(rho_true - rho_measured) sigma^2`` of the target's noise. ``recorrupted.max_frame_correlation`` bounds the
measured correlation the scheme trains on (docs/stacks-and-volumes.md says how it was chosen); banding left in the
frames is refused whatever its correlation (row offsets are not white, so no per-pixel draw decorrelates them,
even in the centre frame).

Noise must be Gaussian in the working domain (Poisson-Gaussian data go through the generalized Anscombe
transform, as for the single-frame ``recorrupted``), of known or confidently estimated level, the same in every
frame. The network learns noise ``sqrt(1 + alpha^2)`` times the real level (``recorrupted.alpha``, as for
``recorrupted``). Its default (``auto``) is 1.0, not the single-frame 0.3: the K-frame model can average the
input's extra noise down over the window, so it pays less for noisier inputs and gains more from cleaner targets
(noise ``sigma / alpha``); at fixed steps on the generated sequence 1.0 beat 0.5 by 0.5 dB and 0.3 by 1.2 dB
(docs/benchmarks.md).

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

    def __init__(self, config: dict[str, Any], noise: Any = None, sigma: np.ndarray | None = None,
                 level_maps: bool = True, figures: dict[str, Any] | None = None):
        """``figures``: the record of :meth:`check_data`; its ``recorruption_correlation`` (K x K) is the
        correlation of the frames' recorruption draws (independent draws when it is absent)."""
        super().__init__(config, noise, sigma, level_maps, figures)
        matrix = self.figures.get("recorruption_correlation")
        self.draw_root = None if matrix is None else matrix_square_root(np.asarray(matrix, dtype=np.float64))

    @classmethod
    def check_data(cls, config: dict[str, Any], noisy: list[np.ndarray], frames: int, banding_left: bool
                   ) -> dict[str, Any]:
        """Measure the correlation of the noise between the frames of a window on the stacks ``noisy`` (each
        ``(N, H, W, C)``, working units) and build the recorruption draws' correlation matrix from it. Refuse
        banding left in the frames (not white, so the recorruption does not decorrelate it even in the centre
        frame) and a measured correlation above ``recorrupted.max_frame_correlation``."""
        if banding_left:
            raise ConfigError("scheme 'recorrupted-stack': the noise analysis flags banding and the row/column "
                              "correction is off (data.fixed_pattern); banding repeated along rows reaches the "
                              "network through its target's own row: use neighbor2neighbor-stack, or correct it")
        per_offset = frame_noise_correlations(noisy, frames, cls.stride_for(config))
        largest, limit = max(per_offset, key=abs), config["recorrupted"]["max_frame_correlation"]
        if abs(largest) > limit:
            raise ConfigError(f"scheme 'recorrupted-stack': the noise of frames up to {frames - 1} apart is "
                              f"correlated {largest:.2f} (recorrupted.max_frame_correlation = {limit:g}); the "
                              "recorruption would copy that correlation from an estimate too unsure to keep the "
                              "target's noise out of the neighbours: use neighbor2neighbor-stack, which never "
                              "shows the network a target position in any frame")
        return {"frame_noise_correlation": largest, "frame_noise_correlations": per_offset,
                "recorruption_correlation": correlation_matrix(per_offset).tolist()}

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        n, channels, height, width = patches["noisy"].shape
        other = (rng.random(n) < 0.5)[:, None, None, None]
        window = np.where(other, patches["noisy_b"], patches["noisy"])
        alpha = self.alpha_for(self.config)
        frame_channels = self.sigma.shape[1]
        frames = channels // frame_channels
        white = rng.standard_normal((n, frames, frame_channels, height, width), dtype=np.float32)
        if self.draw_root is not None:  # each pixel's values along the frames drawn with the frames' correlation
            white = np.einsum("jk,nkchw->njchw", self.draw_root.astype(np.float32), white)
        sigma = np.tile(self.sigma, (1, frames, 1, 1))  # frame-major: the same per frame
        z = white.reshape(window.shape) * sigma
        first = (frames // 2) * frame_channels
        target = window[:, first:first + frame_channels] - z[:, first:first + frame_channels] / alpha
        return {"noisy": window, "input": window + alpha * z, "target": target}

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        return torch.mean((apply_model(model, batch["input"]) - batch["target"]) ** 2)


def frame_noise_correlations(stacks: list[np.ndarray], frames: int, stride: int = 1) -> list[float]:
    """The correlation of the noise of a frame with that of the frame ``d`` window positions further along its
    stack, for ``d = 1 .. frames - 1`` (every offset between two frames of a ``frames``-frame window whose frames
    are ``stride`` apart): per offset, the median over up to ``MEASURED_PAIRS`` frame pairs spread over the stacks
    ``(N, H, W, C)`` (:func:`~grainwright.inference.noise.estimation.interframe_noise_correlation`). An offset no
    stack is long enough for reads 0."""
    per_offset = []
    for offset in range(stride, stride * (frames - 1) + 1, stride):
        pairs = [(stack, index) for stack in stacks for index in range(stack.shape[0] - offset)]
        step = max(1, len(pairs) // MEASURED_PAIRS)
        measured = [interframe_noise_correlation(stack[index], stack[index + offset])
                    for stack, index in pairs[::step][:MEASURED_PAIRS]]
        per_offset.append(float(np.median(measured)) if measured else 0.0)
    return per_offset


def frame_noise_correlation(stacks: list[np.ndarray], frames: int) -> float:
    """The correlation of largest size among :func:`frame_noise_correlations` (signed; what the scheme's rule
    compares with ``recorrupted.max_frame_correlation``)."""
    return max(frame_noise_correlations(stacks, frames), key=abs)


def correlation_matrix(per_offset: list[float]) -> np.ndarray:
    """The ``K x K`` Toeplitz correlation matrix ``R[j, k] = rho(|j - k|)`` of a window's frames from the
    correlations ``per_offset`` = ``rho(1) .. rho(K - 1)``, made positive semi-definite (a measured set need not
    be): eigenvalues clipped at 0, then rescaled to a unit diagonal, ``D^-1/2 A D^-1/2`` (the nearest-correlation
    repair by eigenvalue clipping; Higham 2002 gives the iterated exact version)."""
    rho = np.concatenate([[1.0], np.asarray(per_offset, dtype=np.float64)])
    size = len(rho)
    matrix = rho[np.abs(np.arange(size)[:, None] - np.arange(size)[None, :])]
    values, vectors = np.linalg.eigh(matrix)
    clipped = (vectors * np.clip(values, 0.0, None)) @ vectors.T
    scale = 1.0 / np.sqrt(np.clip(np.diag(clipped), 1e-12, None))
    return clipped * scale[:, None] * scale[None, :]


def matrix_square_root(matrix: np.ndarray) -> np.ndarray:
    """The symmetric square root ``S`` of a positive semi-definite matrix, ``S S^T = matrix`` (eigenvalues clipped
    at 0; unlike a Cholesky factor it exists for singular matrices, such as frames with identical noise)."""
    values, vectors = np.linalg.eigh(matrix)
    return (vectors * np.sqrt(np.clip(values, 0.0, None))) @ vectors.T
