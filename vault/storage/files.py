"""Durability helpers shared by everything that writes files."""

from __future__ import annotations

import errno
import os
import tempfile
from pathlib import Path

from vault.errors import NotFound, StorageFull, UsageError


def fsync_path(path: Path) -> None:
    """fsync a file or a directory (a directory's fsync makes renames in it durable)."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def check_output_path(path: Path, option: str) -> Path:
    """Refuse, before anything is done, an output file that could not be written.

    The folder must exist and be writable, and the path must not be a folder
    (NotFound / UsageError); then `write_output` can only fail for lack of space.
    """
    path = Path(path)
    parent = path.parent
    if path.is_dir():
        raise UsageError(f"{option}: {path} is a folder; name a file")
    if not parent.is_dir():
        raise NotFound(f"{option}: folder {parent} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise UsageError(f"{option}: folder {parent} is not writable")
    if path.exists() and not path.is_file():
        raise UsageError(f"{option}: {path} exists and is not a regular file")
    return path


def write_output(path: Path, data: bytes, option: str) -> None:
    """Write `data` to `path` atomically (temp file in the same folder, fsync, rename,
    fsync the folder), mode 0600 whatever the umask. Checks `path` first."""
    path = check_output_path(path, option)
    try:
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    except OSError as exc:
        raise UsageError(f"{option}: cannot create a file in {path.parent}") from exc
    try:
        with os.fdopen(fd, "wb") as out:
            os.fchmod(out.fileno(), 0o600)
            out.write(data)
            out.flush()
            os.fsync(out.fileno())
        os.replace(tmp, path)
        fsync_path(path.parent)
    except OSError as exc:
        Path(tmp).unlink(missing_ok=True)
        if exc.errno in (errno.ENOSPC, errno.EDQUOT):
            raise StorageFull(f"{option}: not enough disk space for {path}") from exc
        raise UsageError(f"{option}: cannot write {path}") from exc
