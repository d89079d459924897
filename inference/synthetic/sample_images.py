"""Open sample photographs for the starting model: scikit-image's bundled sample images, grey, at several scales.

Only images bundled with scikit-image (no download) are used, and never the ones the kit scores learned models
on: ``EXCLUDED`` holds ``grainwright bench train``'s held-out images (camera, coins, moon; a test keeps the two
lists in step). The demo scenario's frames are generated and never enter this set. Images of people
(``astronaut``) are left out as well.
"""
from __future__ import annotations

import numpy as np

# scikit-image sample images the starting model trains on (bundled with the package, open licences).
TRAINING = ("brick", "grass", "gravel", "chelsea", "coffee", "rocket", "page", "text", "cell",
            "immunohistochemistry", "hubble_deep_field", "shepp_logan_phantom", "horse")
# Sample images held out of training to draw the starting model's learning curve.
VALIDATION = ("clock", "retina")
# Never used here: the images `grainwright bench train` scores on, and images of people.
EXCLUDED = ("camera", "coins", "moon", "astronaut")
# Random rescaling of the photographs: each is also kept at these fractions of its size (area-averaged).
SCALES = (1.0, 0.75, 0.5)
LARGEST_EDGE = 768  # larger photographs are first reduced to this edge (they are mostly smooth at full size)


def sample_photo(name: str) -> np.ndarray:
    """The scikit-image sample image ``name`` as float32 grey levels in ``[0, 1]``, shaped ``(H, W)``
    (colour converted with ``skimage.color.rgb2gray``; binary images mapped to 0 and 1)."""
    from skimage import data
    from skimage.color import rgb2gray
    from skimage.transform import rescale

    if name in EXCLUDED:
        raise ValueError(f"sample image '{name}' is held out (used to score models)")
    image = np.asarray(getattr(data, name)())
    if image.ndim == 3:
        image = rgb2gray(image[..., :3])
    elif image.dtype == np.uint8:
        image = image / 255.0
    image = np.asarray(image, dtype=np.float64)
    if max(image.shape) > LARGEST_EDGE:
        image = rescale(image, LARGEST_EDGE / max(image.shape), anti_aliasing=True)
    return np.clip(image, 0.0, 1.0).astype(np.float32)


def rescaled_copies(image: np.ndarray, scales: tuple[float, ...] = SCALES, smallest: int = 64) -> list[np.ndarray]:
    """``image`` at each of ``scales`` (anti-aliased; copies with a side under ``smallest`` pixels left out)."""
    from skimage.transform import rescale

    copies = []
    for scale in scales:
        copy = image if scale == 1.0 else rescale(image, scale, anti_aliasing=True)
        if min(copy.shape) >= smallest:
            copies.append(np.clip(copy, 0.0, 1.0).astype(np.float32))
    return copies
