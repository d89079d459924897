"""One classification of what can go wrong with one file, shared by every front end of the runtime.

The batch command, the line service and the cluster path all process files through
:func:`grainwright.inference.runtime.batch.denoise_file`, which never raises for a per-file fault: it returns a
result carrying a :class:`Fault`. Each front end applies its own documented policy to the fault's kind:

=============  =====================================================  ==========================================
kind           what happened                                          batch ``denoise``
=============  =====================================================  ==========================================
input          the input cannot be read or does not fit the model     report, go on with the next file
               (corrupt, truncated, NaN pixels, wrong channel count)
model          ONNX Runtime failed on this input                      report, go on
memory         not enough memory for this file                        report, go on
no-space       the output filesystem is full (or over quota)          report, stop: every later file would fail
read-only      the output filesystem is mounted read-only             report, stop
permission     the output folder or file may not be written           report, go on (it may be one folder)
write          any other failure writing the output                   report, go on
=============  =====================================================  ==========================================

A fault's text is one line naming the file and the operating system's reason. Outside the per-file engine, a
command that fails to write (or read) a file gets one line too (:func:`os_error_line`, used by the command line
for every command) and exits 1. A failed write never leaves a
partial output (writes are atomic) and never touches an earlier output of the same name.
"""
from __future__ import annotations

import enum
import errno
from dataclasses import dataclass
from pathlib import Path

from grainwright.inference.common.atomic import final_path


class FaultKind(enum.Enum):
    INPUT = "input"
    MODEL = "model"
    MEMORY = "memory"
    NO_SPACE = "no-space"
    READ_ONLY = "read-only"
    PERMISSION = "permission"
    WRITE = "write"

    @property
    def stops_batch(self) -> bool:
        """Whether every later file in the same output folder would fail the same way."""
        return self in (FaultKind.NO_SPACE, FaultKind.READ_ONLY)

    @property
    def output_side(self) -> bool:
        """A fault of the output location, not of the input: retrying later may succeed."""
        return self in (FaultKind.NO_SPACE, FaultKind.READ_ONLY, FaultKind.PERMISSION, FaultKind.WRITE)


@dataclass(frozen=True)
class Fault:
    """What went wrong with one file: its kind, the file it concerns and the reason, on one line."""

    kind: FaultKind
    path: Path | None
    reason: str

    def __str__(self) -> str:
        reason = " ".join(self.reason.split())  # one line, whatever the library printed
        return f"{self.path}: {reason}" if self.path is not None else reason


_WRITE_ERRNOS = {
    errno.ENOSPC: FaultKind.NO_SPACE,
    errno.EDQUOT: FaultKind.NO_SPACE,
    errno.EFBIG: FaultKind.NO_SPACE,
    errno.EROFS: FaultKind.READ_ONLY,
    errno.EACCES: FaultKind.PERMISSION,
    errno.EPERM: FaultKind.PERMISSION,
}


def write_fault(error: BaseException, output: Path) -> Fault:
    """Classify an exception raised while writing ``output``."""
    if isinstance(error, MemoryError):
        return Fault(FaultKind.MEMORY, output, "not enough memory to write the output")
    if isinstance(error, OSError):
        kind = _WRITE_ERRNOS.get(error.errno or 0)
        if kind is None and error.errno is None and "requested and" in str(error) and "written" in str(error):
            # numpy's tofile (used by tifffile) reports a short write without an errno: the disk filled up
            kind = FaultKind.NO_SPACE
        if kind is FaultKind.NO_SPACE:
            return Fault(kind, output, "cannot write: no space left on the output device; free space and rerun "
                                       "(finished outputs are kept and skipped)")
        if kind is not None:
            return Fault(kind, output, f"cannot write: {error.strerror or error}")
        return Fault(FaultKind.WRITE, output, f"cannot write: {error.strerror or error}")
    return Fault(FaultKind.WRITE, output, f"cannot write: {error}")


def model_fault(error: BaseException, source: Path) -> Fault:
    """Classify an exception raised by ONNX Runtime (or the tiling around it) on ``source``."""
    if isinstance(error, MemoryError):
        return Fault(FaultKind.MEMORY, source, "not enough memory to denoise this image (try a smaller --tile)")
    first_line = str(error).strip().splitlines()[0] if str(error).strip() else type(error).__name__
    return Fault(FaultKind.MODEL, source, f"the model failed on this image: {first_line}")


def input_fault(error: BaseException, source: Path) -> Fault:
    """Classify an exception raised while reading ``source`` or checking it against the model."""
    if isinstance(error, MemoryError):
        return Fault(FaultKind.MEMORY, source, "not enough memory to read this image")
    text = str(error)
    prefix = f"{source}: "
    return Fault(FaultKind.INPUT, source, text[len(prefix):] if text.startswith(prefix) else text)


def os_error_line(error: OSError) -> str:
    """One line for an operating-system error outside the per-file engine (a report, a noise description, a
    checkpoint, an ONNX file): the file it concerns (the final name, not a temporary one) and the reason."""
    names = [final_path(name) for name in (error.filename, error.filename2) if name is not None]
    if not names and getattr(error, "destination", None):  # set by the atomic writers
        names = [Path(error.destination)]
    kind = write_fault(error, names[0] if names else Path()).kind
    reason = "no space left on the device" if kind is FaultKind.NO_SPACE else (error.strerror or str(error))
    where = " -> ".join(str(name) for name in names)
    return " ".join((f"{where}: {reason}" if where else reason).split())
