"""Non-local means: Buades, Coll and Morel, "A non-local algorithm for image denoising", CVPR 2005, via
``skimage.restoration.denoise_nl_means``.
"""
from __future__ import annotations

import numpy as np

from grainwright.inference.baselines.base import Baseline, Parameter, by_noise_level


def non_local_means(
    image: np.ndarray,
    sigma: float,
    *,
    patch_radius: int = 2,
    search_radius: int = 6,
    strength: float = 0.6,
    fast: bool = True,
) -> np.ndarray:
    """Non-local means (Buades, Coll and Morel 2005): each pixel becomes a mean of pixels whose surrounding
    patches look alike, weighted by ``exp(-max(d^2 - 2 sigma^2, 0) / h^2)`` with ``d`` the patch distance.

    Parameters
    ----------
    image : (H, W, C) float32.
    sigma : noise standard deviation (also given to scikit-image, which then discounts the noise's own
        contribution ``2 sigma^2`` from each patch distance).
    patch_radius : patches are (2 * patch_radius + 1) pixels square.
    search_radius : largest distance in pixels at which similar patches are looked for.
    strength : filter strength ``h`` as a multiple of ``sigma``.
    fast : scikit-image's fast mode (uniform patch weights, integral images) instead of the Gaussian-weighted
        patch distance of the original paper.
    """
    # Imported on use: skimage.restoration imports scipy.stats, which is slow to load and fails under
    # tests/test_package.py's torch block (SciPy's array-API check reads sys.modules['torch']).
    from skimage.restoration import denoise_nl_means

    out = denoise_nl_means(
        image.astype(np.float64),
        patch_size=2 * int(patch_radius) + 1,
        patch_distance=int(search_radius),
        h=strength * sigma,
        sigma=sigma,
        fast_mode=bool(fast),
        preserve_range=True,
        channel_axis=-1,
    )
    return out.reshape(image.shape).astype(np.float32)


BASELINES = (
    Baseline(
        name="nlm",
        title="non-local means (Buades et al. 2005)",
        function=non_local_means,
        parameters=(
            Parameter("patch_radius", "pixels", "half-width of the compared patches", search=(2, 3)),
            Parameter("search_radius", "pixels", "half-width of the search window"),
            Parameter("strength", "x sigma", "filter strength h",
                      search=(0.4, 0.6, 0.8, 1.0), calibration=(0.4, 0.6, 0.8, 1.0)),
            Parameter("fast", "choice", "scikit-image fast mode"),
        ),
        # Picked most often by our ground-truth grid search on six scikit-image sample crops at sigma 5 to 50
        # (8-bit units); no published source. Search radius 6 and fast mode: scikit-image's
        # gallery example, from memory.
        defaults=lambda level: {
            "patch_radius": by_noise_level(level, 2, 2, 3),
            "search_radius": 6,
            "strength": by_noise_level(level, 0.8, 0.6, 0.6),
            "fast": True,
        },
    ),
)
