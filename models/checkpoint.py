"""Checkpoints and run folders: the format the trainer writes and the export reads.

A checkpoint is a ``torch.save`` file holding one dict of plain data (str, int, float, bool, None, lists, dicts
and tensors). It is loaded with ``torch.load(..., weights_only=True)``, whose unpickler accepts only those types:
no code stored in a checkpoint ever runs, and a file that would need to run code is refused.

Payload keys (every checkpoint):

``format``             ``"grainwright-checkpoint"``
``format_version``     int, ``FORMAT_VERSION``; a newer one than this code knows is refused
``architecture``       registry name, e.g. ``"residual"``
``hyper``              dict of the architecture's hyper-parameters (``depth``, ``width``, ``skip``, ...)
``channels``           int, image channels in and out
``state_dict``         the model's weights (``DenoisingNetwork.state_dict()``)
``normalization``      dict from ``grainwright.inference.images.normalization.Normalization.to_dict()``, transform
                       included (dtype, bit depth, native range, channels, channel order, transform)
``noise``              dict from ``NoiseModel.to_dict()`` (the noise model of training), or None
``scheme``             training scheme name (``"supervised"``, ``"recorrupted"``, ...), or None
``training_summary``   dict written by the trainer (steps, minutes, best validation figures, ...), or None
``data_fingerprint``   str, :func:`data_fingerprint` of the training file list, or None
``training_noise``     dict describing the training data as the runtime's domain check needs it, or None:
                       ``sigma_native`` (float, typical noise standard deviation of the training images in native
                       units, e.g. the median over images of the MAD estimate, averaged over channels),
                       ``sigma_native_range`` ([min, max] over images, native units), ``effective_bit_depth``
                       (int or None); more keys may be added
``created``            ISO 8601 UTC time the checkpoint was written
``tool_version``       grainwright version that wrote it

Added by the trainer in ``checkpoints/last.pt`` only, to resume exactly: ``optimizer`` (state dict),
``scheduler`` (state dict), ``rng`` (dict of generator states), ``step`` (int). Loading ignores them.

A run folder (written by ``grainwright train``)::

    RUN_DIR/config.toml              resolved training configuration
    RUN_DIR/noise.toml               noise description used in training (when there is one)
    RUN_DIR/training-summary.json    final summary (also inside the checkpoints)
    RUN_DIR/checkpoints/last.pt      latest state, with the resume keys
    RUN_DIR/checkpoints/best.pt      best validation so far; what ``grainwright export RUN_DIR`` exports
    RUN_DIR/checkpoints/start.pt     the state training started from (the starting model or an earlier
                                     run, with this run's data description); absent for random weights
"""
from __future__ import annotations

import datetime
import hashlib
import pickle
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Mapping

import torch

from grainwright.inference import __version__
from grainwright.inference.common.atomic import atomic_path
from grainwright.inference.common.errors import GrainwrightError, InputError
from grainwright.models.base import DenoisingNetwork
from grainwright.models.registry import architecture, build_model

FORMAT = "grainwright-checkpoint"
FORMAT_VERSION = 1
REQUIRED_KEYS = ("format", "format_version", "architecture", "hyper", "channels", "state_dict", "normalization")
OPTIONAL_KEYS = ("noise", "scheme", "training_summary", "data_fingerprint", "training_noise", "created", "tool_version")


@dataclass(frozen=True)
class RunFolder:
    """Paths inside a run folder."""

    root: Path

    @property
    def config(self) -> Path:
        return self.root / "config.toml"

    @property
    def noise(self) -> Path:
        return self.root / "noise.toml"

    @property
    def summary(self) -> Path:
        return self.root / "training-summary.json"

    @property
    def checkpoints(self) -> Path:
        return self.root / "checkpoints"

    @property
    def last(self) -> Path:
        return self.checkpoints / "last.pt"

    @property
    def best(self) -> Path:
        return self.checkpoints / "best.pt"

    @property
    def start(self) -> Path:
        return self.checkpoints / "start.pt"


def resolve_checkpoint(path: str | Path) -> Path:
    """A checkpoint file as given, or the best checkpoint of a run folder.

    Raises
    ------
    InputError
        The path does not exist, or the run folder has no ``checkpoints/best.pt``.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(path, "no such checkpoint file or run folder")
    if path.is_dir():
        run = RunFolder(path)
        if run.best.is_file():
            return run.best
        hint = f"; {run.last} exists (pass it to use the latest state)" if run.last.is_file() else ""
        raise InputError(path, f"not a run folder with a best checkpoint: {run.best} is missing{hint}")
    return path


def data_fingerprint(files: Iterable[str | Path]) -> str:
    """SHA-256 over the sorted file names and byte sizes of the training files (not their contents).

    Identifies the file list cheaply: the same names and sizes give the same fingerprint wherever they live.
    """
    digest = hashlib.sha256()
    for name, size in sorted((Path(f).name, Path(f).stat().st_size) for f in files):
        digest.update(f"{name}\t{size}\n".encode())
    return "sha256:" + digest.hexdigest()


def checkpoint_payload(
    model: DenoisingNetwork,
    normalization: Any,
    *,
    noise: Any = None,
    scheme: str | None = None,
    training_summary: Mapping[str, Any] | None = None,
    data_fingerprint: str | None = None,
    training_noise: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The payload dict for ``model`` and its data descriptions (objects with ``to_dict()`` or plain dicts)."""
    return {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "architecture": model.name,
        "hyper": dict(model.hyper),
        "channels": model.channels,
        "state_dict": {key: value.detach().clone() for key, value in model.state_dict().items()},
        "normalization": _as_dict(normalization),
        "noise": _as_dict(noise),
        "scheme": scheme,
        "training_summary": None if training_summary is None else dict(training_summary),
        "data_fingerprint": data_fingerprint,
        "training_noise": None if training_noise is None else dict(training_noise),
        "created": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
        "tool_version": __version__,
    }


def new_checkpoint(
    name: str,
    channels: int,
    normalization: Any,
    *,
    hyper: Mapping[str, Any] | None = None,
    seed: int = 0,
    **descriptions: Any,
) -> dict[str, Any]:
    """A payload for a freshly built, randomly initialised model (seeded), e.g. to export without training.

    ``descriptions`` are passed on to :func:`checkpoint_payload` (``noise``, ``scheme``, ...).
    """
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        model = build_model(name, channels, **dict(hyper or {}))
    return checkpoint_payload(model, normalization, **descriptions)


def save_checkpoint(path: str | Path, payload: Mapping[str, Any]) -> Path:
    """Write ``payload`` atomically (temporary file in the same folder, then rename); parents are created."""
    path = Path(path)
    missing = [key for key in REQUIRED_KEYS if key not in payload]
    if missing:
        raise ValueError(f"checkpoint payload lacks {missing}")
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(path, durable=True) as temporary:
        torch.save(dict(payload), temporary)
    return path


def load_checkpoint(path: str | Path) -> dict[str, Any]:
    """Read a checkpoint file or a run folder's best checkpoint, without running any code stored in it.

    Raises
    ------
    InputError
        Missing file; not a checkpoint at all (empty, text, another format) or damaged; stored code (a payload
        that is not plain data; it is refused, never run); not a grainwright checkpoint; a format version newer
        than this grainwright reads.
    """
    path = resolve_checkpoint(path)
    try:
        payload = torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as error:
        # The restricted unpickler names the first disallowed import as "GLOBAL module.name": that is stored code
        # (also in a pickle that looks like text). Any other refusal is not code but not a checkpoint either.
        reason = next((line for line in str(error).splitlines() if "GLOBAL" in line), "").strip()
        if reason:
            raise InputError(path, f"refused: not plain data, loading it would run code. {reason}") from None
        raise InputError(path, _not_a_checkpoint(path, error)) from None
    except (RuntimeError, EOFError, OSError, ValueError, KeyError, UnicodeError) as error:
        raise InputError(path, _not_a_checkpoint(path, error)) from None
    if not isinstance(payload, dict) or payload.get("format") != FORMAT:
        raise InputError(path, "not a grainwright checkpoint (no 'format' key naming it)")
    version = payload.get("format_version")
    if not isinstance(version, int) or version < 1:
        raise InputError(path, f"bad checkpoint format version {version!r}")
    if version > FORMAT_VERSION:
        raise InputError(
            path,
            f"checkpoint format version {version} is newer than this grainwright reads ({FORMAT_VERSION}); "
            "update grainwright",
        )
    missing = [key for key in REQUIRED_KEYS if key not in payload]
    if missing:
        raise InputError(path, f"checkpoint lacks {', '.join(missing)}")
    for key in OPTIONAL_KEYS:
        payload.setdefault(key, None)
    try:
        architecture(payload["architecture"])
    except GrainwrightError as error:
        raise InputError(path, str(error)) from None
    return payload


# How torch.save files begin: a zip archive (the format since PyTorch 1.6), or the legacy format's pickled magic
# number (protocol 2, then a 10-byte LONG1 integer).
TORCH_SIGNATURES = (b"PK\x03\x04", b"\x80\x02\x8a\x0a")


def _not_a_checkpoint(path: Path, error: BaseException) -> str:
    """Why a file without stored code could not be loaded, judged by how it begins."""
    try:
        with open(path, "rb") as handle:
            head = handle.read(64)
    except OSError as read_error:
        return f"cannot be read ({read_error.strerror or read_error})"
    if not head:
        return "is empty, not a checkpoint"
    if head.startswith(TORCH_SIGNATURES):
        return f"damaged or truncated checkpoint ({_first_line(error)})"
    try:
        head.decode("utf-8")
    except UnicodeDecodeError:
        return "not a checkpoint: an unknown binary format, neither a torch.save archive nor a pickle"
    return "not a checkpoint: a text file, where torch.save writes a binary archive"


def _first_line(error: BaseException) -> str:
    text = str(error).strip()
    return f"{type(error).__name__}: {text.splitlines()[0]}" if text else type(error).__name__


def model_from_checkpoint(payload: Mapping[str, Any], path: str | Path | None = None) -> DenoisingNetwork:
    """Rebuild the model of a loaded payload with its weights, in eval mode."""
    try:
        model = build_model(payload["architecture"], payload["channels"], **payload["hyper"])
        model.load_state_dict(payload["state_dict"])
    except (GrainwrightError, RuntimeError) as error:
        raise InputError(path, f"checkpoint weights do not fit its architecture: {error}") from None
    return model.eval()


def _as_dict(description: Any) -> dict[str, Any] | None:
    if description is None or isinstance(description, dict):
        return description
    return description.to_dict()
