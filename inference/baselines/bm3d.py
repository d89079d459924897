"""BM3D, written here in vectorised numpy from the published algorithm.

Dabov, Foi, Katkovnik and Egiazarian, "Image denoising by sparse 3-D transform-domain collaborative
filtering", IEEE Trans. Image Processing 16(8), 2007. Two stages, each over reference blocks on a grid:

1. Block matching: the blocks of the search window closest to the reference block (mean squared
   difference below a threshold) are stacked into a 3-D group, at most ``group_size`` of them and a power
   of two (the 1-D Haar transform needs it).
2. Collaborative filtering: a 2-D transform of each block, a 1-D transform along the group; stage one hard
   thresholds the coefficients at ``threshold * sigma``, stage two shrinks them with the empirical Wiener
   gain ``B^2 / (B^2 + sigma^2)`` where ``B`` is the same group taken from the stage-one estimate (and the
   matching is done on that estimate too).
3. Aggregation: every filtered block returns to its place, weighted by a Kaiser window and by the group's
   weight (stage one: ``1 / (sigma^2 * kept coefficients)``, stage two: ``1 / (sigma^2 * |gain|^2)``).

Colour images are filtered in an opponent colour space with matching on its luminance channel, as the
paper's colour extension does; other channel counts are filtered channel by channel.

Parameter values from the paper's "normal profile", quoted from memory (sigma <= 40 on the 8-bit scale):
block size 8, search window 39 x 39 (radius 19), reference step 3, at most 16 blocks per group in stage one
and 32 in stage two, lambda_3D = 2.7, Kaiser window beta = 2, matching thresholds 2500 (stage one) and 400
(stage two) on the 8-bit scale for the mean squared block difference. Our choices: the 2-D DCT in both
stages (the paper uses a bior1.5 wavelet in stage one and names the DCT as an alternative), no 2-D
prefiltering before matching (as we recall, the paper uses none below sigma 40), and matching thresholds
expressed as multiples of sigma^2 (4.0 and 0.64, which equal the paper's values at sigma = 25/255) so that
they keep their meaning in any unit or transformed domain.

Speed: the search is exhaustive over the window, as in the paper, computed as matrix products over tiles of
references; about 20-30 CPU seconds per megapixel on one core (``grainwright bench baselines``). Memory: the
image, a few float64 accumulators of its size, and bounded chunks of groups (a few hundred MB at 1 MP).
"""
from __future__ import annotations

import functools

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy.fft import dct

from grainwright.inference.baselines.base import Baseline, Parameter
from grainwright.inference.common.errors import ConfigError

# Opponent colour transform of the paper's colour extension (rows: luminance, two opponent axes); from memory.
OPPONENT = np.array([[1 / 3, 1 / 3, 1 / 3], [1 / 2, 0.0, -1 / 2], [1 / 4, -1 / 2, 1 / 4]])

# References per side of a matching tile and reference rows per processing band: about 8 keeps each tile's
# search area (its references' windows together) small enough that most of the matrix product is used.
_MATCH_TILE = 8
_CHUNK_REFS = 2048


def dct_matrix(size: int) -> np.ndarray:
    """Orthonormal DCT-II matrix ``D`` with ``D @ x == scipy.fft.dct(x, norm="ortho")``."""
    return dct(np.eye(size), norm="ortho", axis=0).astype(np.float32)


@functools.lru_cache(maxsize=None)
def haar_matrix(size: int) -> np.ndarray:
    """Orthonormal 1-D Haar transform matrix for a power-of-two ``size`` (rows are the basis vectors)."""
    if size == 1:
        return np.ones((1, 1), dtype=np.float32)
    coarse = haar_matrix(size // 2)
    rows = np.vstack([np.kron(coarse, [1.0, 1.0]), np.kron(np.eye(size // 2), [1.0, -1.0])])
    return (rows / np.linalg.norm(rows, axis=1, keepdims=True)).astype(np.float32)


def _reference_positions(extent: int, step: int) -> np.ndarray:
    """Top-left corners on a ``step`` grid, always including the last one so every pixel is covered."""
    positions = np.arange(0, extent, step)
    if positions[-1] != extent - 1:
        positions = np.append(positions, extent - 1)
    return positions


def _match(guide: np.ndarray, ref_y: np.ndarray, ref_x: np.ndarray, block: int, radius: int) -> np.ndarray:
    """Mean squared difference between each reference block and every block of its search window.

    Returns ``(len(ref_y), len(ref_x), (2 radius + 1)^2)`` float32, displacements in row-major order
    (dy, dx) from -radius to radius; blocks outside the image get +inf and the reference itself -1, so it
    always leads its own group. Vectorised as matrix products: for a tile of references, ``|r - c|^2 =
    |r|^2 + |c|^2 - 2 r.c`` against every block of the tile's joint search area in one BLAS call, then each
    reference keeps its own window. ``guide`` should be roughly zero-mean (the caller subtracts the mean) so
    that float32 loses nothing in the subtraction.
    """
    height, width = guide.shape
    span = 2 * radius + 1
    blocks = sliding_window_view(guide, (block, block))  # (H - B + 1, W - B + 1, B, B), a view
    offsets = np.arange(-radius, radius + 1)
    out = np.empty((len(ref_y), len(ref_x), span, span), dtype=np.float32)
    rows = ref_y[:, None] + offsets[None]  # (n_y, span) candidate rows
    valid_rows = (rows >= 0) & (rows <= height - block)
    top, bottom = max(int(ref_y[0]) - radius, 0), min(int(ref_y[-1]) + radius, height - block)
    references = blocks[ref_y]  # (n_y, W - B + 1, B, B)
    for start in range(0, len(ref_x), _MATCH_TILE):
        tile_x = ref_x[start : start + _MATCH_TILE]
        left, right = max(int(tile_x[0]) - radius, 0), min(int(tile_x[-1]) + radius, width - block)
        area_w = right - left + 1
        candidates = blocks[top : bottom + 1, left : right + 1].reshape(-1, block * block)
        tile = references[:, tile_x].reshape(-1, block * block)
        squared = (
            np.einsum("ij,ij->i", tile, tile)[:, None]
            + np.einsum("ij,ij->i", candidates, candidates)[None, :]
            - 2.0 * (tile @ candidates.T)
        )  # (n_y * n_tile, area)
        cols = tile_x[:, None] + offsets[None]  # (n_tile, span)
        index = (np.clip(rows - top, 0, bottom - top)[:, None, :, None] * area_w
                 + np.clip(cols - left, 0, area_w - 1)[None, :, None, :])  # (n_y, n_tile, span, span)
        picked = np.take_along_axis(squared, index.reshape(len(squared), -1), axis=1)
        valid = valid_rows[:, None, :, None] & ((cols >= 0) & (cols <= width - block))[None, :, None, :]
        picked = np.where(valid.reshape(picked.shape), np.maximum(picked, 0.0) / (block * block), np.inf)
        out[:, start : start + len(tile_x)] = picked.reshape(len(ref_y), len(tile_x), span, span)
    out[:, :, radius, radius] = -1.0
    return out.reshape(len(ref_y), len(ref_x), span * span)


def _select(distances: np.ndarray, group_size: int, threshold: float) -> tuple[np.ndarray, np.ndarray]:
    """Indices of the ``group_size`` closest candidates (sorted) and each group's power-of-two size."""
    count = min(group_size, distances.shape[1])
    nearest = np.argpartition(distances, count - 1, axis=1)[:, :count]
    nearest_d = np.take_along_axis(distances, nearest, axis=1)
    order = np.argsort(nearest_d, axis=1, kind="stable")
    nearest = np.take_along_axis(nearest, order, axis=1)
    matched = np.maximum((np.take_along_axis(nearest_d, order, axis=1) < threshold).sum(axis=1), 1)
    sizes = 2 ** np.floor(np.log2(matched)).astype(np.int64)
    return nearest, sizes


def _forward(groups: np.ndarray, dct2: np.ndarray, haar: np.ndarray) -> np.ndarray:
    """3-D transform of groups ``(n, k, C, B, B)``: 2-D DCT per block, then 1-D Haar along the group.

    ``dct2`` is the separable 2-D DCT as one ``(B^2, B^2)`` matrix acting on row-major blocks,
    ``kron(D, D)``, so all blocks go through a single matrix product.
    """
    n, k = groups.shape[:2]
    spectra = (groups.reshape(-1, dct2.shape[0]) @ dct2.T).reshape(n, k, -1)
    return (haar @ spectra).reshape(groups.shape)


def _inverse(spectra: np.ndarray, dct2: np.ndarray, haar: np.ndarray) -> np.ndarray:
    n, k = spectra.shape[:2]
    blocks = haar.T @ spectra.reshape(n, k, -1)
    return (blocks.reshape(-1, dct2.shape[0]) @ dct2).reshape(spectra.shape)


def _filter_groups(
    groups: np.ndarray,
    guide_groups: np.ndarray | None,
    sigmas: np.ndarray,
    threshold: float,
    dct2: np.ndarray,
    haar: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Collaborative filtering of groups ``(n, k, C, B, B)``: the filtered groups and each group's weight (n, C).

    Without ``guide_groups``: hard thresholding at ``threshold * sigma``, weight ``1 / (sigma^2 * kept)``.
    With them (stage two): Wiener shrinkage by ``G^2 / (G^2 + sigma^2)`` of the guide's spectrum ``G``,
    weight ``1 / (sigma^2 * |gain|^2)``.
    """
    variance = (sigmas.astype(np.float32) ** 2)[None, :]  # (1, C)
    spectra = _forward(groups, dct2, haar)
    if guide_groups is None:
        keep = np.abs(spectra) >= threshold * sigmas.astype(np.float32)[None, None, :, None, None]
        spectra *= keep
        weights = 1.0 / (variance * np.maximum(keep.sum(axis=(1, 3, 4)), 1))
    else:
        power = _forward(guide_groups, dct2, haar) ** 2
        gain = power / (power + variance[:, None, :, None, None])
        spectra *= gain
        weights = 1.0 / (variance * np.maximum((gain**2).sum(axis=(1, 3, 4)), 1e-12))
    return _inverse(spectra, dct2, haar), weights


def _stage(
    noisy: np.ndarray,
    guide: np.ndarray,
    basic: np.ndarray | None,
    sigmas: np.ndarray,
    *,
    block: int,
    radius: int,
    step: int,
    group_size: int,
    match_threshold: float,
    threshold: float,
    kaiser_beta: float,
) -> np.ndarray:
    """One BM3D stage: hard thresholding when ``basic`` is None, else Wiener filtering guided by ``basic``."""
    height, width, channels = noisy.shape
    ref_y = _reference_positions(height - block + 1, step)
    ref_x = _reference_positions(width - block + 1, step)
    span = 2 * radius + 1
    noisy_blocks = sliding_window_view(noisy, (block, block), axis=(0, 1))  # (Y, X, C, B, B)
    basic_blocks = None if basic is None else sliding_window_view(basic, (block, block), axis=(0, 1))
    dct2 = np.kron(dct_matrix(block), dct_matrix(block))
    window = np.outer(np.kaiser(block, kaiser_beta), np.kaiser(block, kaiser_beta)).astype(np.float32)
    within = np.arange(block)
    numerator = np.zeros((channels, height * width))
    denominator = np.zeros((channels, height * width))
    centred = (guide - np.float32(guide.mean())).astype(np.float32)  # distances ignore offsets; float32 does not
    # References filtered together: bounds the group arrays (refs x group x C x B x B floats) to tens of MB.
    chunk_x = max(_MATCH_TILE, _CHUNK_REFS // (_MATCH_TILE * _MATCH_TILE) * _MATCH_TILE)
    for start in range(0, len(ref_y), _MATCH_TILE):
        band_y = ref_y[start : start + _MATCH_TILE]
        # Every block of this band lies in these rows; aggregating there keeps each histogram small.
        row0, row1 = max(int(band_y[0]) - radius, 0), min(int(band_y[-1]) + radius + block, height)
        band = slice(row0 * width, row1 * width)
        for first in range(0, len(ref_x), chunk_x):
            part_x = ref_x[first : first + chunk_x]
            distances = _match(centred, band_y, part_x, block, radius).reshape(-1, span * span)
            nearest, sizes = _select(distances, group_size, match_threshold)
            all_y = np.repeat(band_y, len(part_x))[:, None] + nearest // span - radius
            all_x = np.tile(part_x, len(band_y))[:, None] + nearest % span - radius
            for size in np.unique(sizes):
                chosen = sizes == size
                ys, xs = all_y[chosen, :size], all_x[chosen, :size]
                guide_groups = None if basic_blocks is None else basic_blocks[ys, xs]
                estimates, weights = _filter_groups(
                    noisy_blocks[ys, xs], guide_groups, sigmas, threshold, dct2, haar_matrix(int(size))
                )
                pixels = (ys[:, :, None, None] - row0 + within[:, None]) * width + (xs[:, :, None, None] + within)
                pixels = pixels.ravel()
                for c in range(channels):
                    weighted_window = weights[:, c, None, None, None] * window  # (n, 1, B, B)
                    values = (weighted_window * estimates[:, :, c]).ravel()
                    mass = np.broadcast_to(weighted_window, estimates[:, :, c].shape).ravel()
                    numerator[c, band] += np.bincount(pixels, weights=values, minlength=band.stop - band.start)
                    denominator[c, band] += np.bincount(pixels, weights=mass, minlength=band.stop - band.start)
    estimate = numerator / denominator
    return estimate.T.reshape(height, width, channels).astype(np.float32)


def _bm3d_joint(image: np.ndarray, sigmas: np.ndarray, params: dict) -> np.ndarray:
    """BM3D on channels that share their groups (matching on channel 0)."""
    common = dict(
        block=params["block"], radius=params["search_radius"], step=params["step"], kaiser_beta=params["kaiser_beta"]
    )
    guide_sigma = float(sigmas[0])
    basic = _stage(
        image, image[:, :, 0], None, sigmas,
        group_size=params["group_hard"], match_threshold=params["match_hard"] * guide_sigma**2,
        threshold=params["threshold"], **common,
    )
    if not params["wiener"]:
        return basic
    return _stage(
        image, basic[:, :, 0], basic, sigmas,
        group_size=params["group_wiener"], match_threshold=params["match_wiener"] * guide_sigma**2,
        threshold=params["threshold"], **common,
    )


def bm3d(
    image: np.ndarray,
    sigma: float,
    *,
    threshold: float = 2.7,
    search_radius: int = 19,
    step: int = 3,
    group_hard: int = 16,
    group_wiener: int = 32,
    match_hard: float = 4.0,
    match_wiener: float = 0.64,
    block: int = 8,
    kaiser_beta: float = 2.0,
    wiener: bool = True,
    colour: str = "opponent",
) -> np.ndarray:
    """BM3D (Dabov, Foi, Katkovnik and Egiazarian 2007): block matching and 3-D collaborative filtering.

    Parameters
    ----------
    image : (H, W, C) float32.
    sigma : noise standard deviation, in the image's units.
    threshold : hard threshold lambda_3D of stage one as a multiple of ``sigma`` (paper: 2.7).
    search_radius : half-width in pixels of the search window for similar blocks (paper: 19, a 39 x 39 window).
    step : pixels between reference blocks (paper: 3).
    group_hard, group_wiener : most blocks per group in stage one and two (paper: 16 and 32; powers of two).
    match_hard, match_wiener : largest mean squared difference of a matched block, as a multiple of
        ``sigma^2`` (4.0 and 0.64: the paper's 2500 and 400 on the 8-bit scale at sigma = 25/255).
    block : block size in pixels (paper: 8).
    kaiser_beta : shape of the Kaiser aggregation window (paper: 2).
    wiener : run stage two; False returns the stage-one (hard-threshold) estimate.
    colour : "opponent" filters a 3-channel image in the opponent colour space with shared groups;
        "per-channel" filters each channel on its own. Other channel counts are always per channel.
    """
    if colour not in ("opponent", "per-channel"):
        raise ConfigError(f"bm3d: colour must be opponent or per-channel, not {colour!r}")
    params = dict(
        threshold=threshold, search_radius=int(search_radius), step=int(step), group_hard=int(group_hard),
        group_wiener=int(group_wiener), match_hard=match_hard, match_wiener=match_wiener, block=int(block),
        kaiser_beta=kaiser_beta, wiener=bool(wiener),
    )
    height, width, channels = image.shape
    # Images smaller than a block are padded by edge replication, then cropped back.
    pad_y, pad_x = max(0, block - height), max(0, block - width)
    work = np.pad(image, ((0, pad_y), (0, pad_x), (0, 0)), mode="edge").astype(np.float32)
    # Displacements beyond the image are never valid; don't compute them.
    params["search_radius"] = max(0, min(params["search_radius"], max(work.shape[:2]) - block))
    if channels == 3 and colour == "opponent":
        opponent = (work @ OPPONENT.T.astype(np.float32)).astype(np.float32)
        sigmas = sigma * np.linalg.norm(OPPONENT, axis=1)
        filtered = _bm3d_joint(opponent, sigmas, params) @ np.linalg.inv(OPPONENT).T.astype(np.float32)
    else:
        filtered = np.concatenate(
            [_bm3d_joint(work[:, :, c : c + 1], np.array([sigma]), params) for c in range(channels)], axis=2
        )
    return filtered[:height, :width].astype(np.float32)


BASELINES = (
    Baseline(
        name="bm3d",
        title="BM3D (Dabov et al. 2007)",
        function=bm3d,
        parameters=(
            Parameter("threshold", "x sigma", "stage-one hard threshold lambda_3D",
                      search=(2.2, 2.7, 3.2), calibration=(2.2, 2.7, 3.2)),
            Parameter("search_radius", "pixels", "half-width of the block search window"),
            Parameter("step", "pixels", "distance between reference blocks"),
            Parameter("group_hard", "blocks", "most blocks per group, stage one"),
            Parameter("group_wiener", "blocks", "most blocks per group, stage two"),
            Parameter("match_hard", "x sigma^2", "matching threshold, stage one"),
            Parameter("match_wiener", "x sigma^2", "matching threshold, stage two", search=(0.64, 2.0)),
            Parameter("block", "pixels", "block size"),
            Parameter("kaiser_beta", "number", "Kaiser window shape"),
            Parameter("wiener", "choice", "run the Wiener stage"),
            Parameter("colour", "choice", "opponent or per-channel for colour images"),
        ),
        defaults=lambda level: {
            "threshold": 2.7, "search_radius": 19, "step": 3, "group_hard": 16, "group_wiener": 32,
            "match_hard": 4.0, "match_wiener": 0.64, "block": 8, "kaiser_beta": 2.0, "wiener": True,
            "colour": "opponent",
        },
    ),
)
