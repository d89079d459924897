"""Demo stacks for the multi-frame models: a short conveyor sequence and a small cast volume with internal pores.

Both are generated procedurally from a seed, with their clean frames for scoring; nothing large is stored.

**Conveyor sequence** (axis T). The fixed camera of :mod:`grainwright.inference.synthetic.scenario` looks at the
plant's line: the upper and lower parts of the frame (fixtures and a parked part, rendered by the same scene
generator) hold still, and a lane across the middle carries parts to the right at a constant
``speed`` pixels per frame (whole-pixel shifts, so every clean frame is exact). The motion is stated in
``ConveyorSequence.motion``: the share of moving pixels (the lane's rows over the frame's) and the speed. Noise:
the line camera's sensor model (Poisson-Gaussian with faint row banding drawn afresh for each frame).

**Cast volume** (axis Z). A slab of cast metal sliced by a CT scan: a cylindrical hub with a bore, on a base
plate, its material density lightly textured (smoothed random field), with internal gas pores (ellipsoids of
low density, 1 to 4 voxels in radius) scattered through the metal. Noise: Gaussian in the reconstructed
values with a small correlation between neighbouring slices (``slice_correlation``, as reconstruction filters
spread noise across slices), 12-bit values.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
from scipy import ndimage

from grainwright.inference.common.atomic import write_json_atomic
from grainwright.inference.images.stacks import StackInfo, write_stack
from grainwright.inference.synthetic.scenario import FULL_SCALE, SensorModel, render_clean

# Reconstructed CT values (12-bit DN) of air, the cast metal and the gas in its pores.
AIR_LEVEL = 300.0
METAL_LEVEL = 2600.0
PORE_LEVEL = 900.0


@dataclass
class ConveyorSequence:
    noisy: np.ndarray  # (N, H, W) uint16
    clean: np.ndarray  # (N, H, W) float32 DN
    moving: np.ndarray  # (H, W) bool: pixels whose clean value changes over the sequence (the lane)
    motion: dict = field(default_factory=dict)
    # Hairline cracks with their boxes in each frame where both boxes are whole: dicts of "name", "frame",
    # "moving" (on the lane) and "feature" / "background" boxes [x, y, w, h] (see scenario.Detail).
    cracks: list = field(default_factory=list)


@dataclass
class CastVolume:
    noisy: np.ndarray  # (Z, H, W) uint16
    clean: np.ndarray  # (Z, H, W) float32 DN
    pores: list = field(default_factory=list)  # [(z, y, x, radius)] voxels
    noise: dict = field(default_factory=dict)


def conveyor_sequence(frames: int = 24, height: int = 192, width: int = 256, speed: int = 3,
                      lane: tuple[float, float] = (0.3, 0.7), seed: int = 0,
                      sensor: SensorModel = SensorModel()) -> ConveyorSequence:
    """A fixed camera over a conveyor lane moving ``speed`` pixels per frame to the right.

    Parameters
    ----------
    frames, height, width : int
        Sequence length and frame size in pixels.
    speed : int
        Lane motion in whole pixels per frame (to the right).
    lane : (float, float)
        Top and bottom of the lane as fractions of the height; everything else holds still.
    seed : int
        Seed of the scene and of the noise.
    """
    rng = np.random.default_rng(seed)
    still, still_details, _ = render_clean(height, width, int(rng.integers(2**31)))
    top, bottom = int(round(lane[0] * height)), int(round(lane[1] * height))
    travel = width + speed * (frames - 1)
    # The lane content: scene strips side by side, wide enough for the whole travel.
    strips, belt_details = [], []
    while sum(strip.shape[1] for strip in strips) < travel:
        scene, details, _ = render_clean(height, width, int(rng.integers(2**31)))
        belt_details += [(detail, sum(strip.shape[1] for strip in strips)) for detail in details]
        strips.append(scene[top:bottom])
    belt = np.concatenate(strips, axis=1)[:, :travel]
    clean = np.repeat(still[None].astype(np.float32), frames, axis=0)
    for index in range(frames):
        start = travel - width - speed * index  # content moves right: the window slides left along the belt
        clean[index, top:bottom] = belt[:, start:start + width]
    noisy = np.stack([sensor.sample(frame, rng) for frame in clean])
    noisy = np.clip(np.rint(noisy), 0, FULL_SCALE).astype(np.uint16)
    moving = np.zeros((height, width), bool)
    moving[top:bottom] = np.ptp(clean[:, top:bottom], axis=0) > 0
    motion = {"speed_pixels_per_frame": speed, "direction": "right", "lane_rows": [top, bottom],
              "moving_share": float(moving.mean()), "frames": frames}
    cracks = _sequence_cracks(still_details, belt_details, (top, bottom), width, frames,
                              [travel - width - speed * index for index in range(frames)])
    return ConveyorSequence(noisy, clean, moving, motion, cracks)


def _sequence_cracks(still_details: list, belt_details: list, lane: tuple[int, int], width: int, frames: int,
                     starts: list[int]) -> list[dict]:
    """The cracks of a conveyor sequence, per frame: those of the still scene clear of the lane, and those of the
    lane's strips wherever the belt has carried both their boxes wholly into the frame (and into the lane)."""
    top, bottom = lane

    def inside(box: list[int], low: int, high: int) -> bool:
        x, y, w, h = box
        return 0 <= x and x + w <= width and low <= y and y + h <= high

    cracks = []
    for detail in still_details:
        clear = all(y + h <= top or y >= bottom for _, y, _, h in (detail.feature, detail.background))
        if detail.kind == "crack" and clear:
            cracks += [{"name": detail.name, "frame": index, "moving": False, "feature": list(detail.feature),
                        "background": list(detail.background)} for index in range(frames)]
    for number, (detail, offset) in enumerate(belt_details):
        if detail.kind != "crack":
            continue
        for index, start in enumerate(starts):
            # A strip keeps its scene's rows, so only the column moves: belt column minus the frame's start.
            feature, background = ([x + offset - start, y, w, h] for x, y, w, h in (detail.feature, detail.background))
            if all(inside(box, top, bottom) for box in (feature, background)):
                cracks.append({"name": f"lane-{number}-{detail.name}", "frame": index, "moving": True,
                               "feature": feature, "background": background})
    return cracks


def cast_volume(slices: int = 48, size: int = 128, pores: int = 40, sigma: float = 180.0,
                slice_correlation: float = 0.3, seed: int = 0) -> CastVolume:
    """A cast hub sliced along its axis, with internal gas pores; Gaussian noise correlated between slices.

    Parameters
    ----------
    slices, size : int
        Slices (Z) and the edge of each square slice, voxels.
    pores : int
        Number of gas pores placed inside the metal.
    sigma : float
        Noise standard deviation in DN.
    slice_correlation : float
        Correlation coefficient of the noise of neighbouring slices (an AR(1) process along Z).
    """
    rng = np.random.default_rng(seed)
    z, y, x = np.meshgrid(np.arange(slices), np.arange(size), np.arange(size), indexing="ij")
    centre = (size - 1) / 2
    radius = np.hypot(y - centre, x - centre)
    base = z < slices // 4
    hub = (radius < 0.42 * size) & (z >= slices // 4)
    bore = radius < 0.13 * size
    metal = (base | hub) & ~bore & (np.minimum(y, x) > 4) & (np.maximum(y, x) < size - 5)
    texture = ndimage.gaussian_filter(rng.normal(0, 1, metal.shape), 2.0)
    texture *= 60.0 / max(float(texture.std()), 1e-9)
    clean = np.where(metal, METAL_LEVEL + texture, AIR_LEVEL)
    placed = []
    candidates = np.argwhere(ndimage.binary_erosion(metal, iterations=4))
    for index in rng.choice(len(candidates), size=min(pores, len(candidates)), replace=False):
        pz, py, px = candidates[index]
        pore_radius = float(rng.uniform(1.0, 4.0))
        stretch = rng.uniform(0.7, 1.4, 3)
        inside = (((z - pz) / stretch[0]) ** 2 + ((y - py) / stretch[1]) ** 2
                  + ((x - px) / stretch[2]) ** 2) <= pore_radius**2
        clean[inside] = PORE_LEVEL
        placed.append((int(pz), int(py), int(px), pore_radius))
    # Partial-volume blur of a reconstruction, then noise correlated along Z (AR(1)).
    clean = ndimage.gaussian_filter(clean, 0.6).astype(np.float32)
    innovation = rng.normal(0, sigma, clean.shape)
    noise = np.empty_like(innovation)
    noise[0] = innovation[0]
    keep = np.sqrt(1 - slice_correlation**2)
    for index in range(1, slices):
        noise[index] = slice_correlation * noise[index - 1] + keep * innovation[index]
    noisy = np.clip(np.rint(clean + noise), 0, FULL_SCALE).astype(np.uint16)
    return CastVolume(noisy, clean, placed, {"kind": "gaussian", "sigma_native": sigma,
                                              "slice_correlation": slice_correlation})


def sequence_info(sequence: ConveyorSequence) -> StackInfo:
    """ImageJ time series at 25 frames per second."""
    return StackInfo(*sequence.noisy.shape, 1, np.dtype(np.uint16), axis="T", flavour="imagej", spacing={"T": 0.04},
                     units={"T": "s"})


def volume_info(volume: CastVolume) -> StackInfo:
    """ImageJ z-stack of 0.1 mm voxels."""
    return StackInfo(*volume.noisy.shape, 1, np.dtype(np.uint16), axis="Z", flavour="imagej",
                     spacing={"X": 0.1, "Y": 0.1, "Z": 0.1}, units={"X": "mm", "Y": "mm", "Z": "mm"})


def write_stack_pair(folder: Path, name: str, noisy: np.ndarray, clean: np.ndarray, info: StackInfo) -> None:
    """``noisy-stacks/NAME.tif`` (the input) and ``clean-stacks/NAME.tif`` (float32, for scoring) under ``folder``."""
    write_stack(folder / "noisy-stacks" / f"{name}.tif", iter(noisy[..., None]), info, overwrite=True)
    write_stack(folder / "clean-stacks" / f"{name}.tif", iter(clean[..., None]),
                replace(info, dtype=np.dtype(np.float32)), overwrite=True)


def write_stack_scenario(folder: str | Path, seed: int = 0, *, sequence_frames: int = 24, volume_slices: int = 48,
                         small: bool = False) -> dict:
    """Write the demo stacks: ``noisy-stacks/conveyor.tif`` (ImageJ, T) and ``noisy-stacks/casting.tif``
    (ImageJ, Z, 0.1 mm voxels) for training and denoising, their clean frames under ``clean-stacks/`` and
    ``stacks.json`` (motion, pores, noise). ``small`` makes quick test-sized stacks."""
    folder = Path(folder)
    size = (96, 128) if small else (192, 256)
    sequence = conveyor_sequence(sequence_frames, *size, seed=seed)
    volume = cast_volume(volume_slices, 64 if small else 128, seed=seed)
    write_stack_pair(folder, "conveyor", sequence.noisy, sequence.clean, sequence_info(sequence))
    write_stack_pair(folder, "casting", volume.noisy, volume.clean, volume_info(volume))
    description = {"seed": seed, "conveyor": {"motion": sequence.motion},
                   "casting": {"pores": volume.pores, "noise": volume.noise}}
    write_json_atomic(folder / "stacks.json", description)
    return description
