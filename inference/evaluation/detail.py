"""Did the denoiser erase the detail that matters? Contrast retention, removed-structure maps, added edges.

Every figure here needs only the noisy image and the output:

- contrast retention of a region of interest (a feature box and a background box): region means of the noisy
  image are unbiased for zero-mean noise, so the noisy image's feature-minus-background contrast stands in for
  the clean one's;
- a map of where the removed content (the residual, noisy minus output) is structured rather than noise-like:
  the local correlation of the residual with a smoothed copy of the noisy image that leaves out each pixel's own
  value, so that removed noise, independent from pixel to pixel, correlates with it by zero on average (the idea
  of looking at the "method noise" is Buades, Coll and Morel 2005);
- a flag for added structure: edges in the output that a smoothed copy of the noisy input does not have.

Boxes are ``[x, y, w, h]`` in pixels: column and row of the top-left corner, width, height.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import ndimage

from grainwright.inference.common.errors import InputError

Box = tuple[int, int, int, int]

# Width (pixels) of the Gaussian window of the local correlation. The spread of a local correlation between
# two independent white signals under a Gaussian window of width w is about 1 / sqrt(4 pi w**2): 0.094 at 3 px.
CORRELATION_WINDOW = 3.0
# A pixel counts as structured when its local correlation exceeds four of those spreads.
STRUCTURED_THRESHOLD = 4.0 / math.sqrt(4.0 * math.pi * CORRELATION_WINDOW**2)
# Removed content smaller than this fraction of the noise's standard deviation does not count as removed
# structure, however well it correlates (common practice, no source).
MIN_REMOVED = 0.25


@dataclass(frozen=True)
class Region:
    """A named region of interest: a feature box and a nearby background box, ``[x, y, w, h]`` each."""

    name: str
    feature: Box
    background: Box

    def to_dict(self) -> dict:
        return {"feature": list(self.feature), "background": list(self.background)}


def _gray(image: np.ndarray) -> np.ndarray:
    image = np.asarray(image, dtype=np.float64)
    return image.mean(axis=2) if image.ndim == 3 else image


def _box_mean(plane: np.ndarray, box: Box) -> float:
    x, y, w, h = box
    return float(plane[y : y + h, x : x + w].mean())


def _box_std(plane: np.ndarray, box: Box) -> float:
    x, y, w, h = box
    return float(plane[y : y + h, x : x + w].std())


def check_box(box: Box, shape: tuple[int, ...], where: str = "region") -> Box:
    """Validate an ``[x, y, w, h]`` box against an image shape; raise ``InputError`` if it does not fit."""
    if len(box) != 4 or not all(isinstance(v, (int, np.integer)) or float(v).is_integer() for v in box):
        raise InputError(None, f"{where}: a box is four whole numbers [x, y, w, h], got {list(box)}")
    x, y, w, h = (int(v) for v in box)
    height, width = shape[:2]
    if w < 1 or h < 1 or x < 0 or y < 0 or x + w > width or y + h > height:
        raise InputError(None, f"{where}: box [{x}, {y}, {w}, {h}] does not fit in a {width}x{height} image")
    return (x, y, w, h)


def contrast_retention(noisy: np.ndarray, output: np.ndarray, region: Region) -> float:
    """Share of a feature's contrast that survived denoising.

    ``(mean(feature) - mean(background))`` in the output divided by the same in the noisy input (channels
    averaged). 1.0 means the contrast was kept, 0.5 that half of it was wiped out, above 1 that it was
    exaggerated. NaN when the noisy contrast is exactly zero.
    """
    noisy_gray, output_gray = _gray(noisy), _gray(output)
    before = _box_mean(noisy_gray, region.feature) - _box_mean(noisy_gray, region.background)
    after = _box_mean(output_gray, region.feature) - _box_mean(output_gray, region.background)
    return after / before if before != 0 else math.nan


def contrast_to_noise(image: np.ndarray, region: Region) -> float:
    """Contrast-to-noise ratio: ``|mean(feature) - mean(background)| / std(background)``.

    Reported beside contrast retention, never alone: it rises whenever noise drops, even if the feature blurs.
    """
    gray = _gray(image)
    spread = _box_std(gray, region.background)
    contrast = abs(_box_mean(gray, region.feature) - _box_mean(gray, region.background))
    return contrast / spread if spread > 0 else math.inf


def contrast_standard_error(region: Region, sigma: float) -> float:
    """Standard error of the noisy image's feature-minus-background contrast for white noise of std ``sigma``.

    A region whose noisy contrast is not several of these is too faint for its retention figure to mean much.
    """
    feature_pixels = region.feature[2] * region.feature[3]
    background_pixels = region.background[2] * region.background[3]
    return sigma * math.sqrt(1.0 / feature_pixels + 1.0 / background_pixels)


def load_regions(path: str | Path) -> dict[str, list[Region]]:
    """Read a regions file: ``{image file name: {region name: {"feature": box, "background": box}}}``.

    Raises ``InputError`` naming the file for anything malformed.
    """
    path = Path(path)
    try:
        document = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(path, "regions file not found") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as error:
        raise InputError(path, f"not a readable JSON regions file ({error})") from None
    if not isinstance(document, dict):
        raise InputError(path, "expected an object mapping image file names to named regions")
    regions: dict[str, list[Region]] = {}
    for image_name, named in document.items():
        if not isinstance(named, dict):
            raise InputError(path, f"{image_name}: expected an object of named regions")
        regions[image_name] = []
        for name, pair in named.items():
            if not isinstance(pair, dict) or set(pair) < {"feature", "background"}:
                raise InputError(path, f"{image_name}/{name}: expected 'feature' and 'background' boxes")
            try:
                feature = tuple(int(v) for v in pair["feature"])
                background = tuple(int(v) for v in pair["background"])
            except (TypeError, ValueError):
                raise InputError(path, f"{image_name}/{name}: boxes are lists of four numbers [x, y, w, h]") from None
            if len(feature) != 4 or len(background) != 4:
                raise InputError(path, f"{image_name}/{name}: boxes are lists of four numbers [x, y, w, h]")
            regions[image_name].append(Region(str(name), feature, background))
    return regions


def _kernel_norm(shape: tuple[int, int], **gaussian: float) -> float:
    """L2 norm of a (derivative of) Gaussian filter's impulse response: its gain on unit white noise."""
    impulse = np.zeros(shape)
    impulse[shape[0] // 2, shape[1] // 2] = 1.0
    return float(np.sqrt(np.sum(ndimage.gaussian_filter(impulse, **gaussian) ** 2)))


def find_regions(
    noisy: np.ndarray,
    sigma: float,
    *,
    count: int = 4,
    smoothing: float = 2.0,
    surround: float = 6.0,
    max_side: int = 24,
) -> list[Region]:
    """Find small high-contrast structures automatically, each with a nearby flat background box.

    The noisy image (channels averaged) is strongly smoothed (Gaussian of ``smoothing`` pixels); its difference
    from a wider smoothing (``surround`` pixels) responds to spots, lines and small edges. The strongest peaks
    more than five noise spreads above zero are taken in turn, each blanking its whole structure; a feature box
    covers the structure around the peak (response above half the peak, at most ``max_side`` pixels a side,
    at least 3), and the background box of the same size is the flattest of the four boxes beside it.

    Parameters
    ----------
    noisy : ndarray
        ``(H, W)`` or ``(H, W, C)``.
    sigma : float
        Noise standard deviation of the channel-averaged image, in its units.
    count : int
        Most regions returned.
    smoothing, surround : float
        Widths in pixels of the two Gaussian smoothings.
    max_side : int
        Largest feature box side in pixels.

    Returns
    -------
    list of Region
        Named ``auto-1``, ``auto-2``, ... strongest first; possibly fewer than ``count`` (none on a flat image).
    """
    gray = _gray(noisy)
    height, width = gray.shape
    response = ndimage.gaussian_filter(gray, smoothing) - ndimage.gaussian_filter(gray, surround)
    magnitude = np.abs(response)
    probe_shape = (min(height, 8 * int(surround) + 1), min(width, 8 * int(surround) + 1))
    impulse = np.zeros(probe_shape)
    impulse[probe_shape[0] // 2, probe_shape[1] // 2] = 1.0
    difference_kernel = ndimage.gaussian_filter(impulse, smoothing) - ndimage.gaussian_filter(impulse, surround)
    noise_spread = sigma * float(np.sqrt(np.sum(difference_kernel**2)))
    available = np.ones_like(magnitude, dtype=bool)
    margin = int(2 * smoothing)
    available[:margin] = available[-margin:] = False
    available[:, :margin] = available[:, -margin:] = False
    regions: list[Region] = []
    while len(regions) < count:
        candidates = np.where(available, magnitude, 0.0)
        peak_index = int(np.argmax(candidates))
        peak_y, peak_x = divmod(peak_index, width)
        peak = candidates[peak_y, peak_x]
        if peak <= 5.0 * noise_spread:
            break
        feature = _feature_box(magnitude, response, peak_y, peak_x, max_side)
        background = _background_box(magnitude, feature)
        # Blank the whole structure (a long crack gives one region, not several) and a margin around it.
        sign = np.sign(response[peak_y, peak_x])
        labels, _ = ndimage.label((magnitude >= 0.3 * peak) & (np.sign(response) == sign))
        structure = ndimage.binary_dilation(labels == labels[peak_y, peak_x], iterations=max_side // 2)
        available &= ~structure
        if background is None:
            continue
        regions.append(Region(f"auto-{len(regions) + 1}", feature, background))
    return regions


def _feature_box(magnitude: np.ndarray, response: np.ndarray, peak_y: int, peak_x: int, max_side: int) -> Box:
    height, width = magnitude.shape
    half = max_side // 2
    top, left = max(0, peak_y - half), max(0, peak_x - half)
    window = magnitude[top : peak_y + half + 1, left : peak_x + half + 1]
    same_sign = np.sign(response[top : peak_y + half + 1, left : peak_x + half + 1]) == np.sign(
        response[peak_y, peak_x]
    )
    labels, _ = ndimage.label((window >= 0.5 * magnitude[peak_y, peak_x]) & same_sign)
    rows, cols = np.nonzero(labels == labels[peak_y - top, peak_x - left])
    y0, y1 = top + rows.min(), top + rows.max() + 1
    x0, x1 = left + cols.min(), left + cols.max() + 1
    # At least 3 pixels a side, centred on the structure, inside the image.
    if y1 - y0 < 3:
        y0 = min(max(0, peak_y - 1), height - 3)
        y1 = y0 + 3
    if x1 - x0 < 3:
        x0 = min(max(0, peak_x - 1), width - 3)
        x1 = x0 + 3
    return (int(x0), int(y0), int(x1 - x0), int(y1 - y0))


def _background_box(magnitude: np.ndarray, feature: Box) -> Box | None:
    height, width = magnitude.shape
    x, y, w, h = feature
    gap = 2
    candidates = [
        (x - w - gap, y, w, h),
        (x + w + gap, y, w, h),
        (x, y - h - gap, w, h),
        (x, y + h + gap, w, h),
    ]
    inside = [b for b in candidates if b[0] >= 0 and b[1] >= 0 and b[0] + b[2] <= width and b[1] + b[3] <= height]
    if not inside:
        return None
    return min(inside, key=lambda b: _box_mean(magnitude, b))


def most_detailed_box(noisy: np.ndarray, size: int, smoothing: float = 2.0) -> Box:
    """The ``size`` x ``size`` window (clipped to the image) with the most edge energy in a smoothed copy."""
    gray = ndimage.gaussian_filter(_gray(noisy), smoothing)
    height, width = gray.shape
    energy = ndimage.sobel(gray, axis=0) ** 2 + ndimage.sobel(gray, axis=1) ** 2
    side_y, side_x = min(size, height), min(size, width)
    local = ndimage.uniform_filter(energy, size=(side_y, side_x), mode="constant")
    # Centres whose window lies inside the image.
    half_y, half_x = side_y // 2, side_x // 2
    valid = local[half_y : height - (side_y - half_y) + 1, half_x : width - (side_x - half_x) + 1]
    cy, cx = np.unravel_index(int(np.argmax(valid)), valid.shape)
    return (int(cx), int(cy), int(side_x), int(side_y))


def _leave_one_out_smoothing(plane: np.ndarray, width: float) -> np.ndarray:
    """Gaussian smoothing that gives each pixel's own value zero weight (the rest renormalised)."""
    # The 2-D kernel is separable, so its centre tap is the square of the 1-D kernel's centre tap.
    impulse = np.zeros((1, 8 * int(math.ceil(width)) + 1))
    impulse[0, impulse.shape[1] // 2] = 1.0
    centre_1d = float(ndimage.gaussian_filter(impulse, sigma=(0, width))[0, impulse.shape[1] // 2])
    centre_weight = centre_1d**2
    smoothed = ndimage.gaussian_filter(plane, width, mode="reflect")
    return (smoothed - centre_weight * plane) / (1.0 - centre_weight)


def structured_residual_map(noisy: np.ndarray, output: np.ndarray, *, guide_width: float = 1.5) -> np.ndarray:
    """Where the removed content looks like image structure rather than noise.

    The residual ``noisy - output`` is correlated, in a Gaussian window of ``CORRELATION_WINDOW`` pixels, with a
    guide: the noisy image smoothed by ``guide_width`` pixels leaving each pixel's own value out. Removed noise,
    independent from pixel to pixel, is uncorrelated with such a guide; removed edges, lines and texture follow
    it. Channels are averaged first.

    Returns
    -------
    ndarray
        ``(H, W)`` float32 local correlation in [-1, 1]; positive where structure was removed, about 0 where
        only noise was, 0 where nothing was removed.
    """
    noisy_gray, output_gray = _gray(noisy), _gray(output)
    residual = noisy_gray - output_gray
    guide = _leave_one_out_smoothing(noisy_gray, guide_width)

    def local(values: np.ndarray) -> np.ndarray:
        return ndimage.gaussian_filter(values, CORRELATION_WINDOW, mode="reflect")

    mean_r, mean_g = local(residual), local(guide)
    var_r = np.maximum(local(residual * residual) - mean_r**2, 0.0)
    var_g = np.maximum(local(guide * guide) - mean_g**2, 0.0)
    cov = local(residual * guide) - mean_r * mean_g
    # A floor far below any noise level keeps untouched areas (zero residual) at zero correlation.
    floor = 1e-12 * max(float(np.mean(noisy_gray**2)), 1e-12)
    correlation = cov / np.sqrt(var_r * var_g + floor)
    return np.clip(correlation, -1.0, 1.0).astype(np.float32)


def removed_structure(noisy: np.ndarray, output: np.ndarray, sigma: float) -> dict:
    """Summary of :func:`structured_residual_map` for one method on one image.

    The removed noise of a real denoiser is not exactly the noise (it is the noise minus what the method left),
    which shifts the whole map by a method-dependent amount, negative for smoothing filters. The map's median
    over the image stands for that shift and is taken off, so the summary counts what stands out locally. The
    correlation does not see how much was removed, so a pixel counts only where the residual's local standard
    deviation reaches ``MIN_REMOVED`` times the noise's: a method that changes almost nothing removes nothing.

    Parameters
    ----------
    noisy, output : ndarray
        ``(H, W)`` or ``(H, W, C)``, same units.
    sigma : float
        Noise standard deviation of the channel-averaged image.

    Returns
    -------
    dict
        ``map``: the correlation map minus its median; ``structured_fraction``: share of pixels above
        ``STRUCTURED_THRESHOLD`` (four white-noise spreads of the local correlation) with enough removed. The
        method with the largest ``structured_fraction`` removed the most structure.
    """
    correlation = structured_residual_map(noisy, output)
    excess = correlation - np.float32(np.median(correlation))
    residual = _gray(noisy) - _gray(output)
    local_mean = ndimage.gaussian_filter(residual, CORRELATION_WINDOW)
    local_var = ndimage.gaussian_filter(residual * residual, CORRELATION_WINDOW) - local_mean**2
    enough = local_var >= (MIN_REMOVED * sigma) ** 2
    return {"map": excess, "structured_fraction": float(np.mean((excess > STRUCTURED_THRESHOLD) & enough))}


def added_structure(
    noisy: np.ndarray,
    output: np.ndarray,
    sigma: float,
    *,
    output_smoothing: float = 1.0,
    reference_smoothing: float = 2.0,
    min_pixels: int = 25,
    min_fraction: float = 0.001,
) -> dict:
    """Flag edges in the output that a smoothed copy of the noisy input does not have.

    Output edges: gradient magnitude after a light smoothing (``output_smoothing`` pixels) above four noise
    spreads of that gradient for white noise of std ``sigma``. Reference edges: gradient of the noisy input
    smoothed by ``reference_smoothing`` pixels above two noise spreads at that scale, widened by 3 pixels.
    Output edges outside the reference are added structure: ringing, texture or shapes the input did not hold.
    The flag is raised above ``max(min_pixels, min_fraction * pixels)`` added pixels (thresholds are common
    practice, no source).

    Returns
    -------
    dict
        ``flag`` (bool), ``added_pixels`` (int), ``added_fraction`` (of the output's edge pixels), ``map``
        (bool ``(H, W)``).
    """
    noisy_gray, output_gray = _gray(noisy), _gray(output)
    shape = (min(noisy_gray.shape[0], 33), min(noisy_gray.shape[1], 33))

    def gradient(plane: np.ndarray, width: float) -> np.ndarray:
        gy = ndimage.gaussian_filter(plane, width, order=(1, 0))
        gx = ndimage.gaussian_filter(plane, width, order=(0, 1))
        return np.hypot(gx, gy)

    output_spread = sigma * _kernel_norm(shape, sigma=output_smoothing, order=(1, 0))
    reference_spread = sigma * _kernel_norm(shape, sigma=reference_smoothing, order=(1, 0))
    output_edges = gradient(output_gray, output_smoothing) > 4.0 * output_spread
    reference_edges = gradient(noisy_gray, reference_smoothing) > 2.0 * reference_spread
    reference_edges = ndimage.binary_dilation(reference_edges, iterations=3)
    added = output_edges & ~reference_edges
    count = int(added.sum())
    return {
        "flag": count > max(min_pixels, min_fraction * added.size),
        "added_pixels": count,
        "added_fraction": count / max(int(output_edges.sum()), 1),
        "map": added,
    }
