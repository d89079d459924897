"""Dead-leaves images: random occluding shapes whose sizes follow a power law, a synthetic stand-in for natural
images when training a generic denoiser.

An image is a stack of opaque shapes dropped one after the other; each new shape falls *under* the ones already
there, so a pixel shows the first shape that covers it. Shape radii are drawn with density ``p(r) ~ r**-3``
between ``radius_min`` and ``radius_max`` pixels, the exponent that makes the model scale invariant (Lee, Mumford
and Huang, "Occlusion models for natural images: a statistical study of a scale-invariant dead leaves model",
International Journal of Computer Vision 41, 2001); images of this kind share the edges, occlusions and the
roughly ``1/f**2`` power spectrum of photographs, and denoisers trained on them come close to those trained on
natural images (Achddou, Gousseau and Ladjal, "Synthetic images as a regularity prior for image restoration
neural networks", SSVM 2021). Each shape is a disk, an ellipse or a rotated rectangle; its grey level is uniform,
optionally with a linear gradient, a random texture (smoothed noise) and an oriented periodic grating; the whole
image is optionally blurred (focus). The gratings stand for the periodic textures of man-made surfaces (tool marks
on a machined face, weaves, printed or etched line patterns), which plain dead leaves lack: textured dead leaves
are the direction Achddou, Gousseau and Ladjal took after the SSVM paper (from memory; the grating model here is
our own).

Rendering is vectorised: shapes are handled in chunks, each chunk rasterised at once into ``(shape, pixel)``
pairs inside the shapes' bounding windows, and every still-uncovered pixel takes the first shape of the chunk
that covers it. Everything is drawn from one ``numpy.random.Generator``, so a seed fixes the image.
"""
from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

SHAPES = ("disk", "ellipse", "rectangle")


@dataclass(frozen=True)
class DeadLeavesSettings:
    """What a dead-leaves image looks like.

    Parameters
    ----------
    size : int
        Edge of the square image, pixels.
    radius_min, radius_max : float
        Smallest and largest shape radius, pixels (the radius of a disk; half the longer side or axis otherwise).
    shapes : tuple of str
        Shape kinds drawn with equal probability, from ``SHAPES``.
    gradient_fraction : float
        Share of shapes with a linear grey-level gradient.
    gradient_max : float
        Largest gradient, grey levels (fractions of the range) per radius of the shape.
    texture_fraction : float
        Share of shapes carrying a small-scale texture (smoothed noise of a random grain).
    texture_max : float
        Largest texture amplitude (standard deviation, fractions of the range).
    texture_grains : tuple of float
        Grains of the textures, pixels (standard deviation of the smoothing Gaussian); each textured shape takes one.
    grating_fraction : float
        Share of shapes carrying an oriented periodic grating (0 draws none, and leaves the random stream of the
        other settings unchanged).
    grating_min, grating_max : float
        Range of the grating amplitudes (half the peak-to-peak swing, fractions of the range), drawn
        log-uniformly: faint gratings, near or under the noise, are as common as strong ones.
    grating_period_min, grating_period_max : float
        Range of the grating periods, pixels (drawn log-uniformly); 2.5 pixels at least, so a grating is sampled
        without aliasing.
    blur_probability : float
        Share of images blurred with a Gaussian of standard deviation up to ``blur_max`` pixels.
    blur_max : float
        Largest blur, pixels.
    """

    size: int = 256
    radius_min: float = 1.0
    radius_max: float = 128.0
    shapes: tuple[str, ...] = SHAPES
    gradient_fraction: float = 0.3
    gradient_max: float = 0.3
    texture_fraction: float = 0.3
    texture_max: float = 0.08
    texture_grains: tuple[float, ...] = (0.7, 1.5, 3.0)
    grating_fraction: float = 0.0
    grating_min: float = 0.005
    grating_max: float = 0.15
    grating_period_min: float = 2.5
    grating_period_max: float = 16.0
    blur_probability: float = 0.3
    blur_max: float = 1.5

    def __post_init__(self) -> None:
        if not 0 < self.radius_min < self.radius_max:
            raise ValueError(f"need 0 < radius_min < radius_max, got {self.radius_min}, {self.radius_max}")
        unknown = set(self.shapes) - set(SHAPES)
        if unknown or not self.shapes:
            raise ValueError(f"shapes must be some of {SHAPES}, got {self.shapes}")
        if self.size < 8:
            raise ValueError(f"size must be at least 8 pixels, got {self.size}")
        if not self.texture_grains or min(self.texture_grains) <= 0:
            raise ValueError(f"texture_grains must be positive pixel sizes, got {self.texture_grains}")
        if not 0 < self.grating_min <= self.grating_max:
            raise ValueError(f"need 0 < grating_min <= grating_max, got {self.grating_min}, {self.grating_max}")
        if not 2.5 <= self.grating_period_min <= self.grating_period_max:
            raise ValueError(f"need 2.5 <= grating_period_min <= grating_period_max, got "
                             f"{self.grating_period_min}, {self.grating_period_max}")


def radius_cdf(radius: np.ndarray | float, radius_min: float, radius_max: float) -> np.ndarray:
    """Cumulative distribution of the radius for the density ``p(r) = c r**-3`` on ``[radius_min, radius_max]``:
    ``F(r) = (radius_min**-2 - r**-2) / (radius_min**-2 - radius_max**-2)``."""
    r = np.clip(np.asarray(radius, dtype=np.float64), radius_min, radius_max)
    return (radius_min ** -2 - r ** -2) / (radius_min ** -2 - radius_max ** -2)


def draw_radii(rng: np.random.Generator, count: int, radius_min: float, radius_max: float) -> np.ndarray:
    """``count`` radii with density proportional to ``r**-3`` on ``[radius_min, radius_max]`` (inverse CDF)."""
    u = rng.random(count)
    return (radius_min ** -2 - u * (radius_min ** -2 - radius_max ** -2)) ** -0.5


def _textures(rng: np.random.Generator, size: int, grains: tuple[float, ...]) -> np.ndarray:
    """Unit-variance texture fields, one per grain (Gaussian-smoothed white noise)."""
    fields = []
    for grain in grains:
        field = ndimage.gaussian_filter(rng.standard_normal((size, size)), grain, mode="wrap")
        fields.append(field / max(field.std(), 1e-6))
    return np.stack(fields).astype(np.float32)


def _cover(rng: np.random.Generator, settings: DeadLeavesSettings, labels: np.ndarray, first: int,
           count: int) -> dict[str, np.ndarray]:
    """Draw ``count`` shapes (numbered from ``first``) and give each uncovered pixel of ``labels`` the first of
    them that covers it; return the shapes' parameters."""
    size = settings.size
    margin = settings.radius_max
    radius = draw_radii(rng, count, settings.radius_min, settings.radius_max)
    centre = rng.uniform(-margin, size + margin, (count, 2))  # shapes may overhang the border
    kind = rng.integers(0, len(settings.shapes), count)
    aspect = rng.uniform(0.3, 1.0, count)
    angle = rng.uniform(0.0, np.pi, count)
    shape_kind = np.array([SHAPES.index(name) for name in settings.shapes])[kind]
    aspect = np.where(shape_kind == 0, 1.0, aspect)
    uncovered = labels < 0
    # Shapes lying wholly outside the image are drawn (they keep the density of every size uniform over the
    # plane) but not rasterised.
    touching = np.all((centre > -radius[:, None]) & (centre < size + radius[:, None]), axis=1)
    # Shapes grouped by window size (powers of two) so each group rasterises as one dense array.
    reach = np.ceil(radius).astype(np.int64)
    group = np.ceil(np.log2(np.maximum(reach, 1))).astype(np.int64)
    for g in np.unique(group[touching]):
        members = np.flatnonzero((group == g) & touching)
        half = int(2 ** g)
        offsets = np.arange(-half, half + 1)
        cy = np.floor(centre[members, 0]).astype(np.int64)
        cx = np.floor(centre[members, 1]).astype(np.int64)
        ys = cy[:, None, None] + offsets[None, :, None]
        xs = cx[:, None, None] + offsets[None, None, :]
        dy = ys + 0.5 - centre[members, 0][:, None, None]
        dx = xs + 0.5 - centre[members, 1][:, None, None]
        cos, sin = np.cos(angle[members])[:, None, None], np.sin(angle[members])[:, None, None]
        u = (dx * cos + dy * sin) / radius[members][:, None, None]
        v = (-dx * sin + dy * cos) / (radius[members] * aspect[members])[:, None, None]
        kinds = shape_kind[members][:, None, None]
        inside = np.where(kinds == 2, np.maximum(np.abs(u), np.abs(v)) <= 1.0, u * u + v * v <= 1.0)
        inside &= (ys >= 0) & (ys < size) & (xs >= 0) & (xs < size)
        shape_index, yy, xx = np.nonzero(inside)
        pixel = ys[shape_index, yy, 0] * size + xs[shape_index, 0, xx]
        keep = uncovered.reshape(-1)[pixel]
        pixel, number = pixel[keep], first + members[shape_index[keep]]
        # The first shape of the chunk on top: minimum shape number per pixel.
        flat = labels.reshape(-1)
        candidate = np.full(size * size, np.iinfo(np.int64).max, dtype=np.int64)
        np.minimum.at(candidate, pixel, number)
        better = candidate < np.where(flat < 0, np.iinfo(np.int64).max, flat)
        flat[better & uncovered.reshape(-1)] = candidate[better & uncovered.reshape(-1)]
    return {"radius": radius, "centre": centre}


def _gratings(rng: np.random.Generator, settings: DeadLeavesSettings, drawn: int, index: np.ndarray,
              yy: np.ndarray, xx: np.ndarray) -> np.ndarray:
    """Each pixel's grating value: for a share of the shapes an oriented periodic profile of random period,
    phase and sharpness (from a sinusoid, sharpness 0, to nearly a square wave, like tool marks), else 0."""
    carries = rng.random(drawn) < settings.grating_fraction
    amplitude = np.where(carries, np.exp(rng.uniform(np.log(settings.grating_min), np.log(settings.grating_max),
                                                     drawn)), 0.0)
    period = np.exp(rng.uniform(np.log(settings.grating_period_min), np.log(settings.grating_period_max), drawn))
    angle = rng.uniform(0.0, np.pi, drawn)
    phase = rng.uniform(0.0, 2 * np.pi, drawn)
    sharpness = rng.uniform(0.0, 3.0, drawn)
    wave = np.sin(2 * np.pi * (xx * np.cos(angle[index]) + yy * np.sin(angle[index])) / period[index] + phase[index])
    gain = np.maximum(sharpness[index], 1e-3)
    return amplitude[index] * np.tanh(gain * wave) / np.tanh(gain)


def dead_leaves_image(rng: np.random.Generator, settings: DeadLeavesSettings = DeadLeavesSettings(),
                      chunk: int = 1000, uncovered_share: float = 3e-3) -> np.ndarray:
    """One dead-leaves image, float32 in ``[0, 1]``, shaped ``(size, size)``.

    Parameters
    ----------
    rng : numpy.random.Generator
        The only source of randomness.
    settings : DeadLeavesSettings
        Radii, shapes, gradients, textures, gratings and blur.
    chunk : int
        Shapes drawn in the first rendering pass; each further pass draws twice as many, until fewer than
        ``uncovered_share`` of the pixels are left uncovered. Those last few pixels (holes smaller than the
        smallest shape, mostly) take the shape of their nearest covered pixel, which saves the many passes that
        exact coverage would need.
    """
    size = settings.size
    labels = np.full((size, size), -1, dtype=np.int64)
    drawn_shapes = []
    drawn = 0
    while (labels < 0).mean() >= uncovered_share:
        drawn_shapes.append(_cover(rng, settings, labels, drawn, chunk))
        drawn += chunk
        chunk *= 2
    if (labels < 0).any():
        nearest = ndimage.distance_transform_edt(labels < 0, return_distances=False, return_indices=True)
        labels = labels[nearest[0], nearest[1]]
    centre = np.concatenate([shapes["centre"] for shapes in drawn_shapes])
    radius = np.concatenate([shapes["radius"] for shapes in drawn_shapes])
    level = rng.random(drawn)
    gradient = np.where(rng.random(drawn) < settings.gradient_fraction,
                        rng.uniform(-settings.gradient_max, settings.gradient_max, drawn), 0.0)
    direction = rng.uniform(0.0, 2 * np.pi, drawn)
    textured = rng.random(drawn) < settings.texture_fraction
    amplitude = np.where(textured, rng.uniform(0.0, settings.texture_max, drawn), 0.0)
    grain = rng.integers(0, len(settings.texture_grains), drawn)
    textures = _textures(rng, size, settings.texture_grains)
    blur = settings.blur_max * rng.random() if rng.random() < settings.blur_probability else 0.0

    image = level[labels]
    index = labels.reshape(-1)
    yy, xx = np.divmod(np.arange(size * size), size)
    # Gradient in grey levels per radius of the shape along a random direction, zero at the shape's centre.
    along = ((yy + 0.5 - centre[index, 0]) * np.sin(direction[index])
             + (xx + 0.5 - centre[index, 1]) * np.cos(direction[index])) / radius[index]
    image += (gradient[index] * along + amplitude[index] * textures[grain[index], yy, xx]).reshape(size, size)
    if settings.grating_fraction > 0:
        image += _gratings(rng, settings, drawn, index, yy, xx).reshape(size, size)
    if blur > 0:
        image = ndimage.gaussian_filter(image, blur, mode="reflect")
    return np.clip(image, 0.0, 1.0).astype(np.float32)


def dead_leaves_stream(seed: int | np.random.SeedSequence,
                       settings: DeadLeavesSettings = DeadLeavesSettings()) -> Iterator[np.ndarray]:
    """An endless, seeded stream of dead-leaves images (``(size, size)`` float32 in ``[0, 1]``)."""
    sequence = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    while True:
        (child,) = sequence.spawn(1)
        yield dead_leaves_image(np.random.default_rng(child), settings)
