"""Monte-Carlo SURE on every registered classical baseline, as ``compare`` uses it, against the true PSNR.

Open data: 256x256 crops of scikit-image's camera and astronaut sample images with Gaussian noise of sigma
25/255 added here (the truth is known). BM3D's hard thresholding and block matching are not smooth, which is
why this check is separate from the one on smooth filters in ``test_sure.py``.
"""
from __future__ import annotations

import numpy as np
import pytest
from skimage import color, data, util

from grainwright.inference.baselines.domains import denoise_in_domain
from grainwright.inference.baselines.registry import BASELINES
from grainwright.inference.evaluation.sure import psnr_from_mse, sure_mse

SIGMA = 25 / 255
IMAGES = {
    "camera": lambda: util.img_as_float(data.camera())[128:384, 128:384],
    "astronaut": lambda: color.rgb2gray(data.astronaut())[:256, 128:384],
}


@pytest.mark.parametrize("image", list(IMAGES))
def test_sure_tracks_the_true_psnr_of_every_baseline(image):
    index = list(IMAGES).index(image)
    clean = IMAGES[image]().astype(np.float32)[:, :, None]
    noisy = clean + SIGMA * np.random.default_rng(index).standard_normal(clean.shape).astype(np.float32)
    for name in BASELINES:

        def denoise(values, name=name):
            return denoise_in_domain(name, values, SIGMA)

        output = denoise(noisy)
        true = psnr_from_mse(float(np.mean((output - clean) ** 2)), 1.0)
        estimate = sure_mse(denoise, noisy, SIGMA, output=output)
        # Three of the estimate's own standard errors (the noise draw's energy, 0.1-0.3 dB here) plus 0.1 dB
        # for the Monte-Carlo divergence; measured errors were -0.11 to +0.32 dB.
        assert abs(estimate.psnr - true) <= 3 * estimate.psnr_standard_error + 0.1, (name, estimate.psnr, true)
