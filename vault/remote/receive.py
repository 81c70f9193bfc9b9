"""An export arrives: unpacked into a staging folder beside `out`, checked with the vault's
public key, then renamed into place. On any failure the staging folder goes and `out` stays
absent (or empty, as it was): a folder at `out` is always a finished, verified export."""

from __future__ import annotations

import errno
import os
import shutil
import tempfile
from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager
from pathlib import Path
from typing import Any

import vault
from vault.errors import Conflict, IntegrityError, StorageFull, UsageError

STAGING_MARK = ".receiving-"
MAX_ARCHIVE_BYTES = 256 * 2**30  # far above any export a vault writes; the service bounds it too
MAX_ARCHIVE_FILES = 1_000_000
MANIFEST = "manifest.json"


def check_out(out: Path) -> Path:
    """The same rule as a local export: a new or empty folder below folders; and one this user
    can create (checked before the request, so no export is made that could not be kept)."""
    out = Path(out)
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise Conflict(f"{out} exists and is not an empty folder; refusing to write an export there")
    probe = out.absolute().parent
    while not probe.exists():
        probe = probe.parent
    if not probe.is_dir():
        raise Conflict(f"{probe} is not a folder; refusing to write an export below it")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise UsageError(f"folder {probe} is not writable", param="out")
    return out


def receive(out: Path, export_id: str, chunks: Callable[[], AbstractContextManager[Iterator[bytes]]],
            public_key: bytes) -> dict[str, Any]:
    """Download, unpack, verify and move the export into `out`; returns verify_export's report."""
    from vault.formats.archive import unpack

    out = check_out(out)
    parent = out.absolute().parent
    try:
        _private_dirs(parent)
        staging = Path(tempfile.mkdtemp(dir=parent, prefix=f".{out.name}{STAGING_MARK}"))
    except OSError as exc:
        raise _write_error(exc, parent) from None
    try:
        with chunks() as stream:
            unpack(stream, staging, max_bytes=MAX_ARCHIVE_BYTES, max_files=MAX_ARCHIVE_FILES)
        report = vault.verify_export(staging, public_key)
        if not report["ok"]:
            raise IntegrityError("the export the service sent does not verify: "
                                 + "; ".join(report["problems"]))
        if report.get("export_id") != export_id:
            raise IntegrityError(f"the service sent another export than {export_id}")
        os.chmod(staging, 0o700)
        if out.exists():
            out.rmdir()  # empty (checked above); rename cannot replace a folder everywhere
        os.replace(staging, out)
        _fsync_dir(parent)
        return report
    except OSError as exc:
        shutil.rmtree(staging, ignore_errors=True)
        raise _write_error(exc, parent) from None
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise


def _write_error(exc: OSError, parent: Path) -> Exception:
    if exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return StorageFull(f"not enough disk space for the export in {parent}; nothing was kept")
    return UsageError(f"cannot write the export in {parent} ({exc.strerror}); nothing was kept",
                      param="out")


def _private_dirs(path: Path) -> None:
    missing = []
    probe = path
    while not probe.exists():
        missing.append(probe)
        probe = probe.parent
    for directory in reversed(missing):
        directory.mkdir(mode=0o700)
        os.chmod(directory, 0o700)


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def check_public_key(held: bytes | str | None, served: str) -> bytes:
    """The key exports are checked with: the one the caller holds, which must be the service's."""
    served_key = vault.parse_public_key(served)
    if held is None:
        return served_key
    mine = vault.parse_public_key(held) if isinstance(held, str) else bytes(held)
    if mine != served_key:
        raise IntegrityError("the service signs with another key than the one you hold "
                             "(MINDWARD_KEY): it may not be your vault's service", hint="public-key")
    if len(mine) != 32:
        raise UsageError("a public key is 32 bytes", param="public_key")
    return mine
