"""Atomic writes: a killed run never leaves a half-written file under the final name.

Every file grainwright writes goes through :func:`atomic_path` (or the helpers built on it): the data goes to a
temporary file in the destination folder, which is renamed over the final name only when complete.

- The temporary name is recognisably ours and says who wrote it: ``.NAME.gw-tmp.HOST.PID.RANDOM``. Folder scans
  skip such names (:func:`is_temporary`), and :func:`remove_stale_temporaries` deletes only those of this host
  whose process is gone: another host's or a live process's file is never touched (services and cluster
  workers write into shared folders).
- The temporary file is created with ``O_CREAT | O_EXCL`` and mode 0666, so the kernel applies the umask (and
  default ACLs) as for a normal write: another account on a plant machine can read the outputs.
- ``durable=True`` also ``fsync``s the file before the rename and the folder after it, so the output survives a
  power cut once the call returns (the line service needs this before it touches an input).
"""
from __future__ import annotations

import contextlib
import errno
import json
import os
import secrets
import shutil
import socket
from collections.abc import Iterator
from pathlib import Path
from typing import Any

TEMPORARY_MARK = ".gw-tmp."


def _host() -> str:
    # dots would make the name ambiguous to parse; a host name has no other separator we use
    return socket.gethostname().replace(".", "-") or "host"


def temporary_name(path: Path) -> Path:
    """A fresh temporary name beside ``path``: ``.NAME.gw-tmp.HOST.PID.RANDOM``."""
    return path.with_name(f".{path.name}{TEMPORARY_MARK}{_host()}.{os.getpid()}.{secrets.token_hex(4)}")


def final_path(path: str | Path) -> Path:
    """The name a temporary file or folder was going to get (``path`` itself when it is not one of ours)."""
    path = Path(path)
    if not is_temporary(path):
        return path
    return path.with_name(path.name[1:].split(TEMPORARY_MARK, 1)[0])


def is_temporary(path: str | Path) -> bool:
    """True for a grainwright temporary file (folder scans skip these)."""
    return TEMPORARY_MARK in Path(path).name and Path(path).name.startswith(".")


def _owner(path: Path) -> tuple[str, int] | None:
    name = path.name
    if not is_temporary(name):
        return None
    try:
        host, pid, _ = name.split(TEMPORARY_MARK, 1)[1].rsplit(".", 2)
        return host, int(pid)
    except ValueError:
        return None


def _process_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


def remove_stale_temporaries(folder: str | Path) -> list[Path]:
    """Delete this host's grainwright temporary files in ``folder`` whose writing process is gone.

    Returns the removed paths. Files of other hosts and of live processes are left alone.
    """
    removed: list[Path] = []
    folder = Path(folder)
    if not folder.is_dir():
        return removed
    host = _host()
    for entry in folder.iterdir():
        owner = _owner(entry)
        if owner is None or owner[0] != host or owner[1] == os.getpid() or _process_alive(owner[1]):
            continue
        with contextlib.suppress(FileNotFoundError):
            if entry.is_dir():  # a temporary run folder
                shutil.rmtree(entry)
            else:
                entry.unlink()
            removed.append(entry)
    return removed


def fsync_folder(folder: str | Path) -> None:
    """Make a rename in ``folder`` durable (POSIX); a no-op where folders cannot be opened (Windows)."""
    try:
        handle = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(handle)
    except OSError:
        pass
    finally:
        os.close(handle)


@contextlib.contextmanager
def atomic_path(path: str | Path, *, durable: bool = False) -> Iterator[Path]:
    """Yield a temporary path to write ``path``'s content to; rename it over ``path`` when the block ends.

    The temporary file exists (empty, mode 0666 minus the umask) when the block starts, so writers that open a
    path by name (tifffile, Pillow, ``torch.save``) can use it. On any exception it is removed and the final
    name is untouched. The destination folder is created when missing.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = temporary_name(path)
    os.close(os.open(temporary, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o666))
    try:
        yield temporary
        if durable:
            with open(temporary, "rb+") as handle:
                os.fsync(handle.fileno())
        os.replace(temporary, path)
    except BaseException as error:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(temporary)
        _name_the_file(error, path)
        raise
    if durable:
        fsync_folder(path.parent)


@contextlib.contextmanager
def atomic_folder(path: str | Path, *, replace_existing: bool = False) -> Iterator[Path]:
    """Yield a fresh temporary folder to fill; rename it to ``path`` when the block ends.

    The folder gets a temporary name of this module (:func:`temporary_name`, so a crashed run's leftover is
    recognised) and mode 0777 minus the umask, like any folder. An existing empty folder at ``path`` is replaced;
    with ``replace_existing`` a folder with content, or a file, too (renamed aside first and deleted once the new
    folder is in place). On any exception the temporary folder and its content are removed and ``path`` is untouched. The
    parent folder is created when missing.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = temporary_name(path)
    os.mkdir(temporary, 0o777)
    try:
        yield temporary
        if replace_existing and (path.is_file() or (path.is_dir() and any(path.iterdir()))):
            retired = temporary_name(path)
            os.replace(path, retired)
            os.replace(temporary, path)
            if retired.is_dir():
                shutil.rmtree(retired, ignore_errors=True)
            else:
                retired.unlink()
            return
        if path.is_dir():
            path.rmdir()  # only an empty one: rmdir refuses anything else
        os.replace(temporary, path)
    except BaseException as error:
        shutil.rmtree(temporary, ignore_errors=True)
        _name_the_file(error, path)
        raise


def _name_the_file(error: BaseException, path: Path) -> None:
    """A failed ``write()`` raises an ``OSError`` without a file name (a full disk, say): record the final name
    beside it (``error.destination``), so that a one-line message can name the file."""
    if isinstance(error, OSError) and not hasattr(error, "destination"):
        error.destination = str(path)


def write_bytes_atomic(path: str | Path, data: bytes, *, durable: bool = False) -> Path:
    """Write ``data`` to ``path`` atomically (see the module docstring)."""
    with atomic_path(path, durable=durable) as temporary:
        with open(temporary, "wb") as out:
            out.write(data)
    return Path(path)


def write_text_atomic(path: str | Path, text: str, *, durable: bool = False) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    return write_bytes_atomic(path, text.encode("utf-8"), durable=durable)


def write_json_atomic(path: str | Path, document: Any, *, durable: bool = False, default: Any = None,
                      indent: int = 2) -> Path:
    """Write ``document`` as indented JSON (trailing newline) to ``path`` atomically; ``default`` converts what
    JSON cannot hold (as in :func:`json.dumps`)."""
    return write_text_atomic(path, json.dumps(document, indent=indent, default=default) + "\n", durable=durable)


def move_file(source: str | Path, target: str | Path, *, durable: bool = True) -> Path:
    """Move a file to ``target`` (replacing it), durably: a rename within a filesystem; across filesystems
    (``EXDEV``) an atomic copy, ``fsync``, then delete of the source, so a crash leaves the file whole in at least
    one place. ``durable`` also ``fsync``s both folders. Returns ``target``."""
    source, target = Path(source), Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    try:
        os.replace(source, target)
    except OSError as error:
        if error.errno != errno.EXDEV:
            raise
        with atomic_path(target, durable=True) as temporary:
            shutil.copyfile(source, temporary)
            shutil.copystat(source, temporary)
        os.unlink(source)
    if durable:
        fsync_folder(target.parent)
        fsync_folder(source.parent)
    return target
