"""Training data: folder layouts, loading once into memory, and vectorised patch sampling.

Folder layouts (plain names of our own, documented in docs/data-layouts.md):

============  =========================================  ====================================
layout        what the data folder holds                 roles of each sample
============  =========================================  ====================================
clean-only    ``clean/`` (+ a noise description)         ``clean``
clean-noisy   ``clean/`` and ``noisy/``, same file names ``clean``, ``noisy``
noisy-pairs   ``noisy-a/`` and ``noisy-b/``, same names  ``noisy``, ``noisy_b``
noisy-stacks  ``noisy-stacks/``: multi-frame files of a  ``noisy``, ``noisy_b`` (frame i, i+1)
              static scene
noisy-only    ``noisy/``, or images directly in the      ``noisy``
              folder
============  =========================================  ====================================

Every image is read once, normalised to the float32 working range, and kept in one flat buffer per role; a
batch of patches is one fancy-indexing gather with the flips and rotations folded into the index arrays.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from grainwright.inference.common.errors import InputError
from grainwright.inference.images.alignment import AlignedNeighbours, aligned_frames
from grainwright.inference.images.layouts import LAYOUT_FOLDERS

LAYOUT_ROLES: dict[str, tuple[str, ...]] = {
    "clean-only": ("clean",),
    "clean-noisy": ("clean", "noisy"),
    "noisy-pairs": ("noisy", "noisy_b"),
    "noisy-stacks": ("noisy", "noisy_b"),
    "noisy-only": ("noisy",),
}
LAYOUT_TEXT: dict[str, str] = {
    "clean-only": "clean images only (clean/)",
    "clean-noisy": "clean/noisy pairs (clean/ + noisy/)",
    "noisy-pairs": "pairs of independent noisy shots (noisy-a/ + noisy-b/)",
    "noisy-stacks": "stacks of noisy frames of a static scene (noisy-stacks/)",
    "noisy-only": "single noisy images",
}


@dataclass
class Layout:
    """What was found in a data folder: the layout name and its files, one tuple per sample (one file per role,
    or a single multi-frame file for ``noisy-stacks``)."""

    name: str
    root: Path
    samples: list[tuple[Path, ...]]

    @property
    def roles(self) -> tuple[str, ...]:
        return LAYOUT_ROLES[self.name]

    @property
    def has_ground_truth(self) -> bool:
        return "clean" in self.roles


def detect_layout(root: str | Path) -> Layout:
    """Find which layout the folder ``root`` holds and pair its files by name.

    In ``noisy-stacks/``, each multi-frame file and each sub-folder of numbered frames is one stack.

    Raises
    ------
    InputError
        The folder is missing or holds no images, or a pair is missing its partner.
    """
    from grainwright.inference.images.imageio import find_images

    root = Path(root)
    if not root.is_dir():
        raise InputError(root, "data folder not found")
    for name, folders in LAYOUT_FOLDERS.items():
        if all((root / folder).is_dir() for folder in folders):
            break
    else:
        name, folders = "noisy-only", (".",)
    lists = [find_images([root / folder]) for folder in folders]
    if name == "noisy-stacks":  # a sub-folder of numbered frames is one stack
        lists[0] += sorted(path for path in (root / folders[0]).iterdir() if path.is_dir())
    if not lists[0]:
        where = root / folders[0] if folders[0] != "." else root
        raise InputError(where, "no images found (supported: PNG, TIFF, .npy)")
    if len(folders) == 1:
        return Layout(name, root, [(path,) for path in lists[0]])
    by_stem = [{path.stem: path for path in files} for files in lists]
    first, second = by_stem
    for stem in sorted(set(first) ^ set(second)):
        have, lack = (folders[0], folders[1]) if stem in first else (folders[1], folders[0])
        source = (first if stem in first else second)[stem]
        raise InputError(source, f"has no partner named '{stem}.*' in {lack}/ (files in {have}/ and {lack}/ are "
                         "paired by name)")
    return Layout(name, root, [(first[stem], second[stem]) for stem in sorted(first)])


class PatchSource:
    """Images of one or more roles held as float32 ``(H, W, C)`` in one flat buffer per role.

    All roles share the image shapes, so one set of indices gathers aligned patches from each.
    """

    def __init__(self, images: dict[str, list[np.ndarray]], focus: list[bool] | None = None,
                 focus_share: float = 0.5):
        roles = list(images)
        first = images[roles[0]]
        self.channels = first[0].shape[2]
        self.heights = np.array([image.shape[0] for image in first], dtype=np.int64)
        self.widths = np.array([image.shape[1] for image in first], dtype=np.int64)
        sizes = self.heights * self.widths * self.channels
        self.offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
        self.buffers = {role: np.concatenate([image.reshape(-1) for image in images[role]]).astype(np.float32)
                        for role in roles}
        self.focus = None if focus is None else np.asarray(focus, bool)
        self.focus_share = float(focus_share)

    def image_weights(self, size: int) -> np.ndarray:
        """The probability of drawing each image for ``size`` x ``size`` patches: in proportion to its number of
        patch positions, and with ``focus`` the focus images together ``focus_share`` of the draws (each group
        still in proportion to positions) when both groups exist."""
        positions = ((self.heights - size + 1) * (self.widths - size + 1)).astype(np.float64)
        if self.focus is None or self.focus.all() or not self.focus.any():
            return positions / positions.sum()
        share = np.where(self.focus, self.focus_share / positions[self.focus].sum(),
                         (1.0 - self.focus_share) / positions[~self.focus].sum())
        return positions * share / (positions * share).sum()

    @property
    def roles(self) -> tuple[str, ...]:
        return tuple(self.buffers)

    def __len__(self) -> int:
        return len(self.heights)

    def image(self, role: str, index: int) -> np.ndarray:
        """Image ``index`` of ``role`` as an ``(H, W, C)`` view."""
        h, w, c = self.heights[index], self.widths[index], self.channels
        start = self.offsets[index]
        return self.buffers[role][start:start + h * w * c].reshape(h, w, c)

    def sample(self, rng: np.random.Generator, count: int, size: int, augment: bool = True,
               flat_level: float | None = None) -> dict[str, np.ndarray]:
        """Draw ``count`` aligned ``size`` x ``size`` patches per role, shaped ``(count, C, size, size)``.

        Images are chosen by :meth:`image_weights` (in proportion to their number of patch positions, focus images
        with their share). With ``augment`` each patch gets one of the 8 flips/90-degree rotations. With
        ``flat_level`` set, patches whose standard deviation (clean role if present, else the first role) is below
        it are replaced by non-flat candidates when there are any.
        """
        draw = count if flat_level is None else 2 * count
        index = rng.choice(len(self), size=draw, p=self.image_weights(size))
        top = (rng.random(draw) * (self.heights[index] - size + 1)).astype(np.int64)
        left = (rng.random(draw) * (self.widths[index] - size + 1)).astype(np.int64)
        code = rng.integers(0, 8, draw) if augment else None
        # One gather per role with an index built by broadcasting (draw, size, 1, 1) + (draw, 1, size, 1) + (C,).
        stride = (self.widths[index] * self.channels)[:, None, None, None]
        start = (self.offsets[index] + (top * self.widths[index] + left) * self.channels)[:, None, None, None]
        flat = (start + np.arange(size)[None, :, None, None] * stride
                + np.arange(size)[None, None, :, None] * self.channels + np.arange(self.channels))
        if flat_level is not None:
            reference = "clean" if "clean" in self.buffers else self.roles[0]
            spread = self.buffers[reference][flat].reshape(draw, -1).std(axis=1)
            order = np.argsort(spread < flat_level, kind="stable")[:count]  # non-flat candidates first, order kept
            flat = flat[order]
            code = None if code is None else code[order]
        patches = {role: buffer[flat] for role, buffer in self.buffers.items()}
        if code is not None:  # the 8 flips / 90-degree rotations: transpose (bit 4), then flip rows (1), columns (2)
            swap, rows, cols = ((code & bit).astype(bool) for bit in (4, 1, 2))
            for array in patches.values():
                array[swap] = array[swap].transpose(0, 2, 1, 3)
                array[rows] = array[rows][:, ::-1]
                array[cols] = array[cols][:, :, ::-1]
        return {role: np.ascontiguousarray(array.transpose(0, 3, 1, 2)) for role, array in patches.items()}


def stack_windows(path: Path, frames: np.ndarray, stack_frames: int, stride: int = 1,
                  alignment: str = "none") -> list[dict[str, np.ndarray]]:
    """Training samples of a multi-frame model from one stack ``(N, H, W, C)``: pairs of K-frame windows K frames
    apart, ``noisy`` centred on frame ``i`` and ``noisy_b`` on frame ``i + K`` (frames side by side along the
    channels, frame-major; reflected at the ends of the stack as at run time). With ``stride`` 1 their frames never
    overlap, so the centre of one is a frame outside the other (Noise2Noise across frames), and every frame is a
    centre. ``stride`` s takes every s-th frame (``i - s r .. i + s r``): a scheme that halves the frames in x and y
    (``neighbor2neighbor-stack``) takes s = 2, so that the motion between neighbouring frames of the window, in
    its half-size pixels, is what the model meets between consecutive frames at full size. An ``alignment`` other
    than ``"none"`` (``"optical-flow"``, ``"dominant-shifts"``) moves each window's neighbours onto its centre frame
    (:mod:`grainwright.inference.images.alignment`, the function the runtime uses), each frame pair's motion
    estimated once on the whole frames."""
    count = frames.shape[0]
    check_stack_length(path, count, stack_frames)
    period = 2 * (count - 1)  # mirror reflection about both end frames, repeated as numpy.pad(mode="reflect")

    def window(centre: int) -> np.ndarray:
        positions = np.abs(centre + stride * (np.arange(stack_frames) - stack_frames // 2)) % period
        positions = np.where(positions > count - 1, period - positions, positions)
        return np.concatenate(aligned_frames(frames, positions, alignment, warped), axis=2)

    warped = AlignedNeighbours(frames, stride, alignment) if alignment != "none" else None

    return [{"noisy": window(i), "noisy_b": window(i + stack_frames)} for i in range(count - stack_frames)]


def check_stack_length(path: Path, count: int, stack_frames: int) -> None:
    """Refuse a stack too short for pairs of ``stack_frames``-frame windows (``InputError`` naming the file)."""
    if count < stack_frames + 1:
        raise InputError(path, f"has {count} frame(s); a {stack_frames}-frame model trains on stacks of at least "
                         f"{stack_frames + 1} frames")


def _read_sample(layout: Layout, sample: tuple[Path, ...], stack_frames: int = 1
                 ) -> list[dict[str, np.ndarray]] | None:
    """Read one sample's files; return one ``{role: (H, W, C) native array}`` per image it yields (for a
    multi-frame model, ``stack_frames`` > 1, the whole stack ``{"noisy": (N, H, W, C)}``), or None (with a
    warning) when a file cannot be read. Non-finite pixels and mismatched pairs are errors."""
    from grainwright.inference.images.imageio import read_frames
    from grainwright.inference.images.stacks import read_stack

    try:
        arrays = [read_stack(path)[0] if path.is_dir() else read_frames(path) for path in sample]
    except InputError as error:
        if "NaN" in error.problem or any(path.is_dir() for path in sample):
            raise  # a folder of frames with a gap or mixed shapes is a data error, not one unreadable file
        warnings.warn(f"skipped {error}", stacklevel=3)
        return None
    if layout.name == "noisy-stacks" and stack_frames > 1:
        check_stack_length(sample[0], arrays[0].shape[0], stack_frames)
        return [{"noisy": arrays[0]}]  # cut into windows once the scheme, and with it the frame stride, is chosen
    if layout.name == "noisy-stacks":
        frames = arrays[0]
        if frames.shape[0] < 2:
            raise InputError(sample[0], f"a stack needs at least 2 frames, found {frames.shape[0]}")
        return [{"noisy": frames[i], "noisy_b": frames[i + 1]} for i in range(frames.shape[0] - 1)]
    if layout.name == "noisy-only":
        return [{"noisy": frame} for frame in arrays[0]]
    for path, frames in zip(sample, arrays):
        if frames.shape[0] != 1:
            raise InputError(path, f"holds {frames.shape[0]} frames; expected a single image in this layout")
    images = [frames[0] for frames in arrays]
    if len(images) == 2:
        (first, second), (path_a, path_b) = images, sample
        if first.shape != second.shape or first.dtype != second.dtype:
            raise InputError(path_a, f"does not match its partner {path_b}: {first.shape} {first.dtype} vs "
                             f"{second.shape} {second.dtype}")
    return [dict(zip(layout.roles, images))]


def read_layout(layout: Layout, patch_size: int, stack_frames: int = 1
                ) -> tuple[list[dict[str, np.ndarray]], list[Path]]:
    """Read every sample of ``layout`` in native values; skip files that cannot be read, with a warning.
    ``stack_frames`` > 1 (a multi-frame model) keeps each stack whole, ``{"noisy": (N, H, W, C)}``, for
    :func:`stack_windows` to cut once the scheme's frame stride is known.

    Returns the images (one ``{role: array}`` per image) and the file each came from.

    Raises
    ------
    InputError
        No image could be read; NaN/Inf pixels; a pair does not match; channel counts differ; an image is
        smaller than the patch size.
    """
    images: list[dict[str, np.ndarray]] = []
    sources: list[Path] = []
    for sample in layout.samples:
        read = _read_sample(layout, sample, stack_frames)
        if read is None:
            continue
        images.extend(read)
        sources.extend([sample[0]] * len(read))
    if not images:
        raise InputError(layout.root, "none of the images could be read")
    channels = images[0][layout.roles[0]].shape[-1]
    for item, source in zip(images, sources):
        array = item[layout.roles[0]]
        height, width = array.shape[-3:-1]  # an image (H, W, C) or a whole stack (N, H, W, C)
        if array.shape[-1] != channels:
            raise InputError(source, f"has {array.shape[-1]} channels, but {sources[0]} has {channels}; all "
                             "training images need the same channel count")
        if min(height, width) < patch_size:
            raise InputError(source, f"is {width}x{height} pixels, smaller than the patch size "
                             f"{patch_size} (lower data.patch_size)")
    return images, sources


def split_by_image(count: int, fraction: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Indices of training and validation images: a ``fraction`` of whole images (at least one when there are
    two or more images and ``fraction > 0``) is held out, never parts of an image."""
    order = rng.permutation(count)
    held = 0 if fraction <= 0 or count < 2 else min(count - 1, max(1, round(fraction * count)))
    return np.sort(order[held:]), np.sort(order[:held])


def split_single_image(image: dict[str, np.ndarray], fraction: float,
                       patch_size: int) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray] | None]:
    """Split one image (or stack window: the last three axes are H, W, C) into a training region and a
    held-out region (the last rows, or columns when the image is wider than tall) when both stay at least one
    patch large; else no validation."""
    array = next(iter(image.values()))
    height, width = array.shape[-3:-1]
    axis = array.ndim - 2 if width > height else array.ndim - 3
    length = array.shape[axis]
    held = max(patch_size, int(round(length * fraction)))
    if fraction <= 0 or length - held < patch_size:
        return image, None
    cut = length - held
    train = {role: np.take(a, np.arange(cut), axis=axis) for role, a in image.items()}
    validation = {role: np.take(a, np.arange(cut, length), axis=axis) for role, a in image.items()}
    return train, validation

