"""The demo scenario: a fictional plant's low-light line camera looking at machined and cast parts.

Every frame is generated procedurally from a seed, so nothing large is stored anywhere. A frame shows a part on a
dark conveyor: a machined face with fine parallel tool marks, a cast body with a granular surface, a bore, bevelled
part edges that catch the light, and a stamped serial number (made up, drawn with Pillow). The details an inspector
cares about are small: pores (dark pits a few pixels across) and hairline cracks (dark lines about one pixel
wide). A slow illumination gradient (lamp profile and vignetting) lies over everything.

The clean frame is then degraded by a sensor model: Poisson-Gaussian noise (shot noise of the photo-electrons
plus read noise; Foi et al. 2008, "Practical Poissonian-Gaussian noise modeling and fitting for single-image
raw-data") plus faint row banding from the line readout (a random offset per row). Frames are 12-bit values in
16-bit containers (uint16, 0..4095).

Regions of interest for every crack and pore are produced with the frame: a feature box tight around (part of)
the detail and a background box of the same size beside it on the same surface, as ``[x, y, w, h]`` in pixels.
"""
from __future__ import annotations

import math
import string
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFont
from scipy import ndimage

from grainwright.inference.common.atomic import write_json_atomic
from grainwright.inference.images.imageio import write_image
from grainwright.inference.noise.models import (
    BandingNoise,
    MixtureNoise,
    NoiseModel,
    PoissonGaussianNoise,
)

BIT_DEPTH = 12
FULL_SCALE = 2**BIT_DEPTH - 1

# Supersampling factor for the anti-aliased geometry (outlines, text, cracks, pores).
SUPERSAMPLE = 4

# Mean signal levels in DN before illumination; a low-light camera sits well below full scale.
CONVEYOR_LEVEL = 140.0
CAST_LEVEL = 950.0
MACHINED_LEVEL = 1900.0
BORE_LEVEL = 260.0


@dataclass(frozen=True)
class SensorModel:
    """Poisson-Gaussian sensor with faint row banding, in native units (DN of the 12-bit output).

    Per pixel, ``noisy = gain * Poisson(clean / gain) + Normal(0, read^2) + offset[row]``, rounded and clipped to
    ``0..4095``; ``offset[row] ~ Normal(0, row_banding^2)``, drawn afresh for each frame. The pixel variance is
    ``gain * clean + read^2`` (Foi et al. 2008), plus ``row_banding^2`` shared along each row. Sampling goes
    through the noise registry (``poisson-gaussian`` then ``banding``, see :mod:`grainwright.inference.noise.models`).

    Parameters
    ----------
    gain : float
        DN per photo-electron (the slope of variance against mean, in DN).
    read : float
        Standard deviation of the signal-independent read noise, in DN.
    row_banding : float
        Standard deviation of the per-row offset, in DN. The default, 24 DN, hides under the pixel noise (about
        100 DN at mid-grey) in any one pixel, but shows as stripes once a denoiser has removed that noise, and a
        256-pixel-wide frame holds enough of each row to detect it.
    """

    gain: float = 8.0
    read: float = 14.0
    row_banding: float = 24.0

    def variance(self, clean: np.ndarray) -> np.ndarray:
        """Per-pixel variance in DN^2 without the row offsets: ``gain * clean + read^2``."""
        return self.gain * np.asarray(clean, dtype=np.float64) + self.read**2

    def noise_model(self) -> NoiseModel:
        """The sensor as a model of the noise registry, in working units (fractions of the 12-bit full scale).

        Variance scales with the square of the unit, so ``gain`` (variance per unit of signal) divides by the full
        scale once, and the standard deviations ``read`` and ``row_banding`` divide by it once.
        """
        pixel = PoissonGaussianNoise(gain=self.gain / FULL_SCALE, read=self.read / FULL_SCALE)
        if self.row_banding <= 0:
            return pixel
        return MixtureNoise([pixel, BandingNoise(row_sigma=self.row_banding / FULL_SCALE, column_sigma=0.0)])

    def sample(self, clean: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Draw a noisy frame (float64 DN, unrounded, unclipped) for a clean frame of shape (H, W) in DN."""
        clean = np.asarray(clean, dtype=np.float64)
        working = (clean / FULL_SCALE).astype(np.float32)[..., None]
        return self.noise_model().sample(working, rng)[..., 0].astype(np.float64) * FULL_SCALE

    def to_noise_description(self) -> dict:
        """The pixel-independent part of the noise as a noise description (working units).

        The row banding is a fixed pattern that the correction removes before training, not part of the
        pixel-independent model the training schemes assume.
        """
        return {"kind": "poisson-gaussian", "gain": self.gain / FULL_SCALE, "read": self.read / FULL_SCALE}


@dataclass
class Detail:
    """One crack or pore and its pair of boxes ``[x, y, w, h]`` (pixels, top-left origin)."""

    name: str
    kind: str
    feature: list[int]
    background: list[int]
    # Darkening in DN at the detail's deepest point, on the clean frame.
    depth: float


@dataclass
class Frame:
    """A generated frame: clean and noisy versions as (H, W, 1) uint16, its details and its serial."""

    clean: np.ndarray
    noisy: np.ndarray
    details: list[Detail] = field(default_factory=list)
    serial: str = ""

    def rois(self) -> dict:
        """The frame's regions of interest: ``{name: {"feature": box, "background": box}}``."""
        return {d.name: {"feature": list(d.feature), "background": list(d.background)} for d in self.details}


# --------------------------------------------------------------------------------------------------------------
# Geometry helpers


def _downsample(canvas: Image.Image, factor: int = SUPERSAMPLE) -> np.ndarray:
    """Coverage in [0, 1] of each output pixel by a supersampled 0/255 mask."""
    a = np.asarray(canvas, dtype=np.uint16)
    h, w = a.shape[0] // factor, a.shape[1] // factor
    blocks = a[: h * factor, : w * factor].reshape(h, factor, w, factor).sum(axis=(1, 3))
    return blocks.astype(np.float32) / (255.0 * factor * factor)


def _smooth_noise(rng: np.random.Generator, shape: tuple[int, ...], sigma: float | tuple) -> np.ndarray:
    """White noise low-passed by a Gaussian of ``sigma`` pixels, scaled to unit standard deviation."""
    field_ = ndimage.gaussian_filter(rng.standard_normal(shape), sigma, mode="wrap")
    return field_ / (field_.std() + 1e-12)


def _box_free(occupied: np.ndarray, box: list[int]) -> bool:
    x, y, w, h = box
    H, W = occupied.shape
    if x < 0 or y < 0 or x + w > W or y + h > H:
        return False
    return not occupied[y : y + h, x : x + w].any()


def _box_on(surface: np.ndarray, box: list[int]) -> bool:
    x, y, w, h = box
    H, W = surface.shape
    if x < 0 or y < 0 or x + w > W or y + h > H:
        return False
    return bool(surface[y : y + h, x : x + w].all())


# --------------------------------------------------------------------------------------------------------------
# Surfaces


def _machined_texture(rng: np.random.Generator, shape: tuple[int, int]) -> np.ndarray:
    """Fine parallel tool marks: a random 1-D profile across the marks, slowly varying along them (DN)."""
    h, w = shape
    angle = rng.uniform(0.0, math.pi)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64)
    across = xx * math.cos(angle) + yy * math.sin(angle)
    lo, hi = across.min() - 2, across.max() + 2
    grid = np.arange(lo, hi, 0.25)
    period = rng.uniform(3.5, 6.0)
    phase = np.cumsum(rng.normal(0.0, 0.02, grid.size))  # feed-rate wander
    profile = 55.0 * np.sin(2 * math.pi * grid / period + phase)
    profile += 30.0 * ndimage.gaussian_filter1d(rng.standard_normal(grid.size), 4.0) * 2.0
    marks = np.interp(across, grid, profile)
    chatter = 1.0 + 0.25 * _smooth_noise(rng, shape, 12.0)
    return marks * chatter + 18.0 * _smooth_noise(rng, shape, 6.0)


def _cast_texture(rng: np.random.Generator, shape: tuple[int, int]) -> np.ndarray:
    """Granular sand-cast surface: fine grains over a coarser mottle (DN)."""
    grains = _smooth_noise(rng, shape, 1.0)
    mottle = _smooth_noise(rng, shape, 5.0)
    return 45.0 * grains + 60.0 * mottle


def _illumination(rng: np.random.Generator, shape: tuple[int, int]) -> np.ndarray:
    """Slow multiplicative illumination: a tilted lamp profile and vignetting, about 0.7 to 1.2."""
    h, w = shape
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64)
    u, v = (xx - w / 2) / max(w, h), (yy - h / 2) / max(w, h)
    cx, cy = rng.uniform(-0.2, 0.2, 2)
    tilt = 1.0 + rng.uniform(-0.25, 0.25) * u + rng.uniform(-0.15, 0.15) * v
    vignette = 1.0 - rng.uniform(0.3, 0.6) * ((u - cx) ** 2 + (v - cy) ** 2)
    return tilt * vignette


def _serial_number(rng: np.random.Generator) -> str:
    letters = string.ascii_uppercase
    return (
        f"{rng.choice(list(letters))}{rng.integers(1, 10)}-{rng.integers(10000, 100000)}"
        f"-{rng.choice(list(letters))}{rng.choice(list(letters))}"
    )


# --------------------------------------------------------------------------------------------------------------
# Details


def _crack_coverage(rng: np.random.Generator, length: float, horizontal: bool) -> np.ndarray:
    """Coverage of a hairline crack in a local patch just large enough for it (3-pixel margins): a wandering
    polyline about one pixel wide, running along x (or y)."""
    points = [(0.0, 0.0)]
    heading = rng.normal(0.0, math.radians(12))
    travelled = 0.0
    while travelled < length:
        step = rng.uniform(2.5, 4.5)
        heading = 0.75 * heading + rng.normal(0.0, math.radians(14))
        x, y = points[-1]
        points.append((x + step * math.cos(heading), y + step * math.sin(heading)))
        travelled += step
    pts = np.array(points)
    if not horizontal:
        pts = pts[:, ::-1]
    pad = 3
    x0, y0 = np.floor(pts.min(axis=0)).astype(int) - pad
    x1, y1 = np.ceil(pts.max(axis=0)).astype(int) + pad
    size = (int(x1 - x0), int(y1 - y0))
    canvas = Image.new("L", (size[0] * SUPERSAMPLE, size[1] * SUPERSAMPLE), 0)
    scaled = [((px - x0) * SUPERSAMPLE, (py - y0) * SUPERSAMPLE) for px, py in pts]
    ImageDraw.Draw(canvas).line(scaled, fill=255, width=max(1, round(0.9 * SUPERSAMPLE)), joint="curve")
    return _downsample(canvas)


def _pore_coverage(radius: float) -> np.ndarray:
    """Coverage of a round pit of ``radius`` pixels, centred in a small odd-sized patch."""
    n = 2 * int(math.ceil(radius)) + 3
    canvas = Image.new("L", (n * SUPERSAMPLE, n * SUPERSAMPLE), 0)
    c = n * SUPERSAMPLE / 2
    r = radius * SUPERSAMPLE
    ImageDraw.Draw(canvas).ellipse([c - r, c - r, c + r, c + r], fill=255)
    return _downsample(canvas)


def _crack_boxes(cover: np.ndarray, horizontal: bool, run: int = 10) -> tuple[int, int, int, int] | None:
    """Tight feature box (local coords) over the straightest ``run``-pixel stretch of a crack."""
    c = cover if horizontal else cover.T
    weights = c.sum(axis=0)
    cols = np.flatnonzero(weights > 0.3)
    if cols.size < run:
        return None
    rows = np.arange(c.shape[0])[:, None]
    centre = (c * rows).sum(axis=0) / np.maximum(weights, 1e-9)
    best = None
    for start in range(cols[0], cols[-1] - run + 2):
        span = centre[start : start + run]
        if (weights[start : start + run] <= 0.3).any():
            continue
        spread = span.max() - span.min()
        if best is None or spread < best[0]:
            best = (spread, start)
    if best is None:
        return None
    start = best[1]
    window = c[:, start : start + run]
    lines = np.flatnonzero(window.max(axis=1) >= 0.35)
    top, height = int(lines[0]), int(lines[-1] - lines[0] + 1)
    if horizontal:
        return start, top, run, height
    return top, start, height, run


def _place_background(
    feature: list[int], along_x: bool, occupied: np.ndarray, surface: np.ndarray, rng: np.random.Generator
) -> list[int] | None:
    """A box the size of ``feature``, beside it across the detail, free of other things and on the same surface."""
    x, y, w, h = feature
    gap = 3
    sides = [1, -1] if rng.random() < 0.5 else [-1, 1]
    for extra in (0, 2, 4):
        for side in sides:
            if along_x:
                box = [x, y + side * (h + gap + extra), w, h]
            else:
                box = [x + side * (w + gap + extra), y, w, h]
            if _box_free(occupied, box) and _box_on(surface, box):
                return box
    return None


# --------------------------------------------------------------------------------------------------------------
# The frame


def _part_masks(rng: np.random.Generator, height: int, width: int) -> tuple[np.ndarray, np.ndarray]:
    """Coverage of the part (a rounded rectangle that may run off the frame, like a long part passing the line
    camera) and of its bore (a round hole through it), as float64 ``(H, W)`` in [0, 1]."""
    S = SUPERSAMPLE
    margins = rng.uniform(0.04, 0.14, 4) * np.array([width, height, width, height])
    margins[rng.random(4) < 0.25] = -10  # this side runs off the frame
    left, top = margins[0], margins[1]
    right, bottom = width - margins[2], height - margins[3]
    outline = Image.new("L", (width * S, height * S), 0)
    draw = ImageDraw.Draw(outline)
    corner = rng.uniform(0.04, 0.1) * min(width, height) * S
    draw.rounded_rectangle([left * S, top * S, right * S, bottom * S], radius=corner, fill=255)
    bore_r = rng.uniform(0.06, 0.11) * min(width, height)
    bore_c = (rng.uniform(left + 2 * bore_r, right - 2 * bore_r), rng.uniform(top + 2 * bore_r, bottom - 2 * bore_r))
    bore_canvas = Image.new("L", outline.size, 0)
    ImageDraw.Draw(bore_canvas).ellipse(
        [(bore_c[0] - bore_r) * S, (bore_c[1] - bore_r) * S, (bore_c[0] + bore_r) * S, (bore_c[1] + bore_r) * S],
        fill=255,
    )
    part = _downsample(outline).astype(np.float64)
    return part, _downsample(bore_canvas).astype(np.float64) * part


def _surface_level(rng: np.random.Generator, part: np.ndarray, bore: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The clean level in DN of conveyor, bore and part (machined face on one side of a slanted split line, cast
    body on the other, bevelled edges catching the light), and the machined share of each pixel."""
    height, width = shape = part.shape
    solid = part - bore
    yy, xx = np.mgrid[0:height, 0:width].astype(np.float64)
    split_angle = rng.normal(0.0, math.radians(10))
    split_at = rng.uniform(0.35, 0.65) * width
    signed = (xx - split_at) * math.cos(split_angle) + (yy - height / 2) * math.sin(split_angle)
    machined_side = rng.random() < 0.5
    machined = np.clip(0.5 + (signed if machined_side else -signed), 0.0, 1.0)

    conveyor = CONVEYOR_LEVEL + 10.0 * _smooth_noise(rng, shape, 3.0)
    cast = CAST_LEVEL + _cast_texture(rng, shape)
    tooled = MACHINED_LEVEL + _machined_texture(rng, shape)
    surface_level = machined * tooled + (1.0 - machined) * cast
    level = (1.0 - part) * conveyor + bore * BORE_LEVEL + solid * surface_level

    # Bevelled edges catch the light: a highlight where the outline (and the machined/cast step) changes.
    edge = ndimage.gaussian_gradient_magnitude(solid, 1.0) + 0.5 * ndimage.gaussian_gradient_magnitude(
        machined * solid, 0.8
    )
    return level + rng.uniform(1500.0, 2200.0) * edge, machined


def _stamp_serial(rng: np.random.Generator, level: np.ndarray, surfaces: tuple[np.ndarray, ...],
                  occupied: np.ndarray) -> tuple[np.ndarray, str]:
    """Stamp a serial number where it fits on one of ``surfaces``: a depression (darker) with a bright rim on the
    lit side. Marks its box in ``occupied``; returns the level and the serial ("" when
    it fitted nowhere)."""
    height, width = level.shape
    S = SUPERSAMPLE
    serial = _serial_number(rng)
    font_px = int(np.clip(min(height, width) / 12, 10, 40))
    font = ImageFont.load_default(size=font_px * S)
    bbox = font.getbbox(serial)
    text_w = math.ceil((bbox[2] - bbox[0]) / S) + 4
    text_h = math.ceil((bbox[3] - bbox[1]) / S) + 4
    for _ in range(40):
        tx, ty = int(rng.integers(0, max(1, width - text_w))), int(rng.integers(0, max(1, height - text_h)))
        box = [tx, ty, text_w, text_h]
        if any(_box_on(surface, box) for surface in surfaces):
            canvas = Image.new("L", (width * S, height * S), 0)
            ImageDraw.Draw(canvas).text(((tx + 2) * S - bbox[0], (ty + 2) * S - bbox[1]), serial, fill=255, font=font)
            glyphs = _downsample(canvas).astype(np.float64)
            rim = np.clip(np.roll(glyphs, (-1, -1), axis=(0, 1)) - glyphs, 0.0, 1.0)
            occupied[max(0, ty - 3) : ty + text_h + 3, max(0, tx - 3) : tx + text_w + 3] = True
            return level * (1.0 - 0.4 * glyphs) + 0.25 * level * rim, serial
    return level, ""


def _draw_detail(rng: np.random.Generator,
                 kind: str) -> tuple[np.ndarray, tuple[int, int, int, int], bool, float] | None:
    """A crack or pore: its coverage patch, its feature box inside the patch ``(x, y, w, h)``, whether it runs
    along x, and its darkening strength; None for a crack too short or crooked to box."""
    if kind == "crack":
        horizontal = bool(rng.random() < 0.5)
        cover = _crack_coverage(rng, rng.uniform(20.0, 45.0), horizontal)
        local = _crack_boxes(cover, horizontal)
        if local is None:
            return None
        return cover, local, horizontal, rng.uniform(0.22, 0.4)
    cover = _pore_coverage(rng.uniform(1.3, 3.0))
    core = np.flatnonzero(cover[cover.shape[0] // 2] >= 0.5)
    local = (int(core[0]), int(core[0]), int(core.size), int(core.size))
    horizontal = bool(rng.random() < 0.5)
    return cover, local, horizontal, rng.uniform(0.3, 0.5)


def _place_details(rng: np.random.Generator, level: np.ndarray, surfaces: tuple[np.ndarray, ...],
                   occupied: np.ndarray) -> tuple[np.ndarray, list[Detail]]:
    """Cracks and pores on free spots of ``surfaces``, each with a background box beside it on the same surface.

    Returns the darkening (a fraction of the local level, so the contrast follows the illumination) and the
    details; marks what they take in ``occupied``.
    """
    height, width = level.shape
    details: list[Detail] = []
    darkening = np.zeros(level.shape)
    area = height * width
    n_cracks = int(np.clip(round(area / 128**2 * 0.5), 1, 12))
    n_pores = int(np.clip(round(area / 128**2 * 1.0), 1, 24))
    for kind, count in (("crack", n_cracks), ("pore", n_pores)):
        placed = 0
        for _attempt in range(40 * count):
            if placed == count:
                break
            drawn = _draw_detail(rng, kind)
            if drawn is None:
                continue
            cover, local, horizontal, strength = drawn
            ph, pw = cover.shape
            px, py = int(rng.integers(0, max(1, width - pw))), int(rng.integers(0, max(1, height - ph)))
            patch = [px, py, pw, ph]
            surface = next((s for s in surfaces if _box_on(s, patch)), None)
            if surface is None or not _box_free(occupied, patch):
                continue
            feature = [px + local[0], py + local[1], local[2], local[3]]
            footprint = occupied.copy()
            footprint[py : py + ph, px : px + pw] |= cover > 0.02
            background = _place_background(feature, horizontal, footprint, surface, rng)
            if background is None:
                continue
            region = (slice(py, py + ph), slice(px, px + pw))
            darkening[region] = np.maximum(darkening[region], strength * cover)
            bx, by, bw, bh = background
            occupied[max(0, py - 4) : py + ph + 4, max(0, px - 4) : px + pw + 4] = True
            occupied[by : by + bh, bx : bx + bw] = True
            depth = float(strength * level[region][cover > 0.5].mean()) if (cover > 0.5).any() else 0.0
            placed += 1
            details.append(Detail(f"{kind}-{placed}", kind, feature, background, depth))
    return darkening, details


def render_clean(height: int, width: int, seed: int | np.random.SeedSequence) -> tuple[np.ndarray, list[Detail], str]:
    """Render a clean frame in DN (float64, (H, W)), its details with their boxes, and its serial number.

    Parameters
    ----------
    height, width : int
        Frame size in pixels (at least 48 each).
    seed : int or numpy.random.SeedSequence
        The same seed gives the same frame.
    """
    if height < 48 or width < 48:
        raise ValueError(f"scenario frames need at least 48x48 pixels, got {height}x{width}")
    rng = np.random.default_rng(seed)
    part, bore = _part_masks(rng, height, width)
    level, machined = _surface_level(rng, part, bore)
    # Everything solid away from edges, split by surface; the serial and the details keep clear of the rest.
    inner = ndimage.binary_erosion(part - bore > 0.999, iterations=6)
    on_machined = inner & (machined > 0.999)
    on_cast = inner & (machined < 0.001)
    occupied = ~(on_machined | on_cast)
    level, serial = _stamp_serial(rng, level, (on_cast, on_machined), occupied)
    darkening, details = _place_details(rng, level, (on_machined, on_cast), occupied)
    clean = np.clip(level * (1.0 - darkening) * _illumination(rng, (height, width)), 0.0, FULL_SCALE)
    return clean, details, serial


def generate_frame(
    height: int, width: int, seed: int | np.random.SeedSequence, sensor: SensorModel | None = None
) -> Frame:
    """Render a clean frame and degrade it with the sensor model; both quantised to 12 bits in uint16.

    The noise is drawn from its own stream, spawned from ``seed``, so the clean frame does not depend on the
    sensor settings.
    """
    sensor = sensor or SensorModel()
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    scene_seed, noise_seed = root.spawn(2)
    clean, details, serial = render_clean(height, width, scene_seed)
    noisy = sensor.sample(clean, np.random.default_rng(noise_seed))
    to_uint16 = lambda a: np.clip(np.rint(a), 0, FULL_SCALE).astype(np.uint16)[..., None]  # noqa: E731
    return Frame(to_uint16(clean), to_uint16(noisy), details, serial)


# --------------------------------------------------------------------------------------------------------------
# Writing a scenario to disk

TRAIN_DIR = "train"  # noisy frames only: what the demo trains on
TRAIN_CLEAN_DIR = "train-clean"  # their clean versions, for scoring only
HOLDOUT_NOISY_DIR = "holdout/noisy"
HOLDOUT_CLEAN_DIR = "holdout/clean"
LARGE_NOISY_DIR = "large/noisy"
LARGE_CLEAN_DIR = "large/clean"
ROIS_FILE = "rois.json"
LARGE_ROIS_FILE = "large-rois.json"
MANIFEST_FILE = "scenario.json"


def write_scenario(
    out_dir: str | Path,
    n_train: int = 24,
    n_holdout: int = 3,
    size: int | tuple[int, int] = 256,
    seed: int = 7,
    large_size: tuple[int, int] | None = (1024, 2048),
    sensor: SensorModel | None = None,
) -> dict:
    """Generate the scenario's frames into ``out_dir`` and return its manifest.

    Layout (TIFF, 12-bit values in uint16):

    - ``train/`` noisy training frames (single noisy shots; no clean images beside them),
      ``train-clean/`` their clean versions, kept apart so the trainer never sees them;
    - ``holdout/noisy`` and ``holdout/clean``: held-out frames matched by name, ``rois.json`` for them;
    - ``large/noisy`` and ``large/clean``: one large held-out frame, ``large-rois.json`` for it;
    - ``scenario.json``: the seed, sizes, sensor parameters, and each frame's serial.

    ROI files map each frame's file name to ``{detail name: {"feature": [x, y, w, h], "background": [...]}}``.

    Parameters
    ----------
    out_dir : path
        Folder to write into (created if needed).
    n_train, n_holdout : int
        Number of training and held-out frames.
    size : int or (height, width)
        Size of training and held-out frames, in pixels.
    seed : int
        Frame ``i`` of each set depends only on ``seed``, the set and ``i``.
    large_size : (height, width) or None
        Size of the large held-out frame; None for none.
    sensor : SensorModel
        The sensor degrading the frames (default parameters when None).
    """
    out = Path(out_dir)
    sensor = sensor or SensorModel()
    height, width = (size, size) if isinstance(size, int) else size
    train_seeds, holdout_seeds, large_seeds = np.random.SeedSequence(seed).spawn(3)
    manifest: dict = {
        "seed": seed,
        "bit_depth": BIT_DEPTH,
        "size": [height, width],
        "sensor": {"gain_dn": sensor.gain, "read_dn": sensor.read, "row_banding_dn": sensor.row_banding},
        "noise": sensor.to_noise_description(),
        "frames": {},
    }

    def emit(sets, h, w, seeds, noisy_dir, clean_dir, prefix):
        rois = {}
        for i, frame_seed in enumerate(seeds.spawn(sets)):
            frame = generate_frame(h, w, frame_seed, sensor)
            name = f"{prefix}-{i:03d}.tif"
            write_image(out / noisy_dir / name, frame.noisy, text=f"grainwright demo scenario, seed {seed}, noisy")
            write_image(out / clean_dir / name, frame.clean, text=f"grainwright demo scenario, seed {seed}, clean")
            rois[name] = frame.rois()
            manifest["frames"][f"{noisy_dir}/{name}"] = {"serial": frame.serial, "details": len(frame.details)}
        return rois

    emit(n_train, height, width, train_seeds, TRAIN_DIR, TRAIN_CLEAN_DIR, "frame")
    holdout = emit(n_holdout, height, width, holdout_seeds, HOLDOUT_NOISY_DIR, HOLDOUT_CLEAN_DIR, "holdout")
    write_json_atomic(out / ROIS_FILE, holdout)
    if large_size is not None:
        rois = emit(1, large_size[0], large_size[1], large_seeds, LARGE_NOISY_DIR, LARGE_CLEAN_DIR, "large")
        write_json_atomic(out / LARGE_ROIS_FILE, rois)
    write_json_atomic(out / MANIFEST_FILE, manifest)
    return manifest
