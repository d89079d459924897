"""What every training scheme shares.

A scheme turns a batch of patches into a loss. Its randomness (synthetic noise, masks, sub-sampling choices) is
drawn in numpy by ``prepare`` from the loop's seeded generator, so a run is reproducible and resumable, and the
validation batches are prepared once with fixed draws. ``loss`` then only does torch arithmetic.
"""
from __future__ import annotations

from typing import Any

import numpy as np
import torch


class Scheme:
    """Base class of the registered training schemes.

    Attributes
    ----------
    name : str
        Registry name.
    layouts : tuple of str
        Data layouts (see :mod:`grainwright.trainer.data`) the scheme can train on.
    needs_no_skip : bool
        True when the architecture must be built without its input-to-output skip (blind-spot training).
    patch_multiple : int
        The patch edge must be a multiple of this times the architecture's alignment.
    needs_noise_level : bool
        True when the scheme needs the noise level (Gaussian after the working-range transform): the trainer then
        takes it from a noise description or a confident estimate, and refuses noise it cannot describe so.
    forward_passes_per_pixel : float
        Cost of one step in forward passes over the patch pixels (a backward pass counts as two), for the
        achieved-GFLOP/s figure.
    multi_frame : bool
        True when the scheme trains multi-frame models on K-frame windows of stacks (``noisy`` and ``noisy_b``
        are windows K frames apart, frame-major channels); single-frame schemes refuse multi-frame models.
    frame_stride : int
        For multi-frame schemes: the training windows take every ``frame_stride``-th frame of a stack (1: K
        consecutive frames, as at run time); a scheme may let a config key override it (``stride_for``).
    default_alpha : float or None
        For Recorrupted-to-Recorrupted schemes: the recorruption strength ``recorrupted.alpha = "auto"`` stands
        for (the scheme's measured best; :meth:`alpha_for`); None for schemes that do not recorrupt.
    default_gamma, fine_tuning_gamma : float or None
        For Neighbor2Neighbor schemes: the consistency regulariser's final weight ``neighbor2neighbor.gamma =
        "auto"`` stands for, from random weights and from trained weights (:meth:`gamma_for`); None for schemes
        without that regulariser.
    clean_targets : bool
        True when the network learns clean targets; False when it learns noisy ones (its output then estimates
        the mean of the noisy data in the working domain, which the log domain's inverse must unbias).
    """

    name: str = ""
    layouts: tuple[str, ...] = ()
    needs_no_skip: bool = False
    patch_multiple: int = 1
    needs_noise_level: bool = False
    forward_passes_per_pixel: float = 3.0
    clean_targets: bool = False
    multi_frame: bool = False
    frame_stride: int = 1
    default_alpha: float | None = None
    default_gamma: float | None = None
    fine_tuning_gamma: float | None = None

    def __init__(self, config: dict[str, Any], noise: Any = None, sigma: np.ndarray | None = None,
                 level_maps: bool = True, figures: dict[str, Any] | None = None):
        """``noise``: the noise model in working units (or None); ``sigma``: per-channel Gaussian standard
        deviation of the noise in working units (known or estimated; None when unknown); ``level_maps``: whether
        the model takes noise-level maps (when not, batches carry none, which saves their cost every step);
        ``figures``: what :meth:`check_data` returned for the training data (empty by default)."""
        self.config = config
        self.figures = dict(figures or {})
        self.noise = noise
        self.sigma = None if sigma is None else np.asarray(sigma, dtype=np.float32).reshape(1, -1, 1, 1)
        self.level_maps = level_maps

    @classmethod
    def stride_for(cls, config: dict[str, Any]) -> int:
        """The frame stride of the training windows under ``config`` (default: the class's ``frame_stride``)."""
        return cls.frame_stride

    @classmethod
    def alpha_for(cls, config: dict[str, Any]) -> float:
        """The recorruption strength under ``config``: ``recorrupted.alpha``, or the scheme's ``default_alpha``
        when it is ``"auto"``."""
        alpha = config["recorrupted"]["alpha"]
        return float(cls.default_alpha if alpha == "auto" else alpha)

    @classmethod
    def gamma_for(cls, config: dict[str, Any]) -> float:
        """The consistency regulariser's final weight under ``config``: ``neighbor2neighbor.gamma``, or when it is
        ``"auto"`` the scheme's ``fine_tuning_gamma`` for a run from trained weights (``start.weights`` not
        ``random``) and its ``default_gamma`` otherwise."""
        gamma = config["neighbor2neighbor"]["gamma"]
        if gamma != "auto":
            return float(gamma)
        from_random = config["start"]["weights"] == "random"  # trainer.start.RANDOM (start imports this module)
        return float(cls.default_gamma if from_random else cls.fine_tuning_gamma)

    @classmethod
    def check_data(cls, config: dict[str, Any], noisy: list[np.ndarray], frames: int, banding_left: bool
                   ) -> dict[str, Any]:
        """Check that the training data suit the scheme before the model is built; raise ``ConfigError`` saying
        what was found otherwise. ``noisy``: the noisy training images in working units (for multi-frame
        schemes the whole stacks ``(N, H, W, C)``, before they are cut into windows), ``frames``: K, ``banding_left``: the noise analysis flagged banding and
        the row/column correction did not run. Returns figures for the training summary (none by default)."""
        return {}

    def prepare(self, patches: dict[str, np.ndarray], rng: np.random.Generator) -> dict[str, np.ndarray]:
        """Add the scheme's random draws to a batch of patches (numpy, ``(N, C, H, W)``)."""
        raise NotImplementedError

    def loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor], progress: float) -> torch.Tensor:
        """The training loss of ``model`` on a prepared batch; ``progress`` runs from 0 to 1 over the budget."""
        raise NotImplementedError

    def validation_loss(self, model: torch.nn.Module, batch: dict[str, torch.Tensor]) -> torch.Tensor:
        """The figure compared between checkpoints when there is no ground truth: by default the training loss
        at the end of the schedule. A scheme whose loss is not comparable between models overrides it."""
        return self.loss(model, batch, 1.0)

    def noise_level(self, batch: dict[str, np.ndarray]) -> np.ndarray | None:
        """The per-pixel noise level of ``batch['noisy']`` for noise-map models, ``(N, 1, H, W)``, or None."""
        if self.sigma is None or not self.level_maps:
            return None
        noisy = batch["noisy"]
        level = np.float32(np.sqrt(np.mean(self.sigma ** 2)))
        return np.full((noisy.shape[0], 1) + noisy.shape[2:], level, dtype=np.float32)


def apply_model(model: torch.nn.Module, image: torch.Tensor, level: torch.Tensor | None = None) -> torch.Tensor:
    """Run ``model`` on ``image``, handing noise-map models their noise level (resized to ``image``).

    The output is float32 even under bfloat16 autocast, so that losses compare it at full precision."""
    if not getattr(model, "takes_noise_map", False):
        return model(image).float()
    if level is None:
        raise ValueError("a noise-map model needs a noise level")
    if level.shape[-2:] != image.shape[-2:]:
        level = level.mean(dim=(2, 3), keepdim=True).expand(-1, -1, *image.shape[-2:])
    return model(image, level).float()
