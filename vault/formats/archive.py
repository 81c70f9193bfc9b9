"""A finished export folder as one tar stream, and back: how a service hands an export over.

`pack(folder)` yields a POSIX tar stream (ustar headers, pax where a name needs it, built by the
standard library's `tarfile`): regular files and folders only, in sorted order, modification
time 0, modes 0600 and 0700, owner and group 0 with no names. It reads each file a block at a
time, so a recording of any size never sits in memory whole.

`unpack(chunks, dest, max_bytes=, max_files=)` reads such a stream with `tarfile`'s streaming
mode and accepts only what `pack` writes: relative names without '.', '..', empty parts,
backslashes or control characters; regular files and folders (no links, devices, fifos or
sparse files); no name twice (also ignoring case); at most `max_files` members and `max_bytes`
of content; a complete stream (its end-of-archive blocks, then only zero padding). Files are
written 0600 and folders 0700 into the existing, empty folder `dest`; on any refusal everything
written there is removed again and `dest` is left empty. Checking what arrived against its
signed manifest is the caller's next step (`vault.verify_export`).
"""

from __future__ import annotations

import errno
import os
import stat
import tarfile
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import IO

from vault.errors import InvalidInput, StorageFull, UsageError

__all__ = ["pack", "unpack"]

CHUNK = 1 << 20  # what pack yields at a time, and reads of a file
_END = b"\x00" * (2 * tarfile.BLOCKSIZE)  # end-of-archive: two zero blocks
_HEADER_ALLOWANCE = 8 * tarfile.BLOCKSIZE  # per member: its header, a pax header, padding
_ACCEPTED = (tarfile.REGTYPE, tarfile.AREGTYPE, tarfile.DIRTYPE)


# --------------------------------------------------------------------------- pack


def pack(folder: str | os.PathLike[str]) -> Iterator[bytes]:
    """The tar stream of `folder`'s contents (not the folder itself), in chunks."""
    root = Path(folder)
    try:
        if not stat.S_ISDIR(os.lstat(root).st_mode):
            raise UsageError("the folder to pack is not a folder")
    except FileNotFoundError:
        raise UsageError("the folder to pack does not exist") from None
    pending = bytearray()
    sent = 0
    for piece in _members(root, ""):
        pending += piece
        if len(pending) >= CHUNK:
            sent += len(pending)
            yield bytes(pending)
            pending.clear()
    pending += _END
    pending += b"\x00" * (-(sent + len(pending)) % tarfile.RECORDSIZE)  # whole records, as tar writes
    yield bytes(pending)


def _header(name: str, kind: bytes, size: int, mode: int) -> bytes:
    info = tarfile.TarInfo(name)
    info.type, info.size, info.mode, info.mtime = kind, size, mode, 0
    info.uid = info.gid = 0
    info.uname = info.gname = ""
    return info.tobuf(tarfile.PAX_FORMAT, "utf-8", "strict")


def _members(root: Path, prefix: str) -> Iterator[bytes]:
    with os.scandir(root / prefix if prefix else root) as it:
        entries = sorted(it, key=lambda e: e.name)
    for entry in entries:
        name = prefix + entry.name
        mode = entry.stat(follow_symlinks=False).st_mode
        if stat.S_ISDIR(mode):
            yield _header(name + "/", tarfile.DIRTYPE, 0, 0o700)
            yield from _members(root, name + "/")
        elif stat.S_ISREG(mode):
            yield from _file(root / name, name)
        else:
            raise InvalidInput("the folder holds something other than regular files and folders "
                               "(a link, device or fifo); nothing was packed")


def _file(path: Path, name: str) -> Iterator[bytes]:
    fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
    with os.fdopen(fd, "rb", buffering=0) as f:
        info = os.fstat(f.fileno())
        if not stat.S_ISREG(info.st_mode):
            raise InvalidInput("a packed file was replaced while the folder was packed")
        yield _header(name, tarfile.REGTYPE, info.st_size, 0o600)
        left = info.st_size
        while left:
            data = f.read(min(CHUNK, left))
            if not data:
                raise InvalidInput("a packed file shrank while the folder was packed")
            left -= len(data)
            yield data
        if f.read(1):
            raise InvalidInput("a packed file grew while the folder was packed")
    yield b"\x00" * (-info.st_size % tarfile.BLOCKSIZE)


# --------------------------------------------------------------------------- unpack


class _Chunks:
    """The chunks as a sequential `.read(n)` for `tarfile`, refusing more than `limit` bytes
    (which also bounds what tarfile holds for a pax or long-name header)."""

    def __init__(self, chunks: Iterable[bytes], limit: int) -> None:
        self._it = iter(chunks)
        self._buf = bytearray()
        self._limit = limit
        self.consumed = 0

    def read(self, n: int = -1) -> bytes:
        want = self._limit + 1 if n is None or n < 0 else n
        while len(self._buf) < want:
            chunk = next(self._it, None)
            if chunk is None:
                break
            if not isinstance(chunk, bytes | bytearray | memoryview):
                raise InvalidInput("archive stream: a chunk is not bytes; nothing was kept")
            self._buf += chunk
            if self.consumed + len(self._buf) > self._limit:
                raise InvalidInput("archive is larger than its limits allow; nothing was kept")
        out = bytes(self._buf[:want])
        del self._buf[:want]
        self.consumed += len(out)
        return out


class _Member(tarfile.TarInfo):
    """Notes on the archive whether iteration ended at a proper end-of-archive block."""

    @classmethod
    def fromtarfile(cls, tar: tarfile.TarFile) -> tarfile.TarInfo:
        try:
            return super().fromtarfile(tar)
        except tarfile.EOFHeaderError:
            tar.reached_end = True  # type: ignore[attr-defined]
            raise


def _check_name(name: str, index: int) -> tuple[str, ...]:
    where = f"archive member {index}"
    if name.startswith("/"):
        raise InvalidInput(f"{where}: an absolute path; nothing was kept")
    parts = tuple(name[:-1].split("/") if name.endswith("/") else name.split("/"))
    for part in parts:
        if part in ("", ".", ".."):
            raise InvalidInput(f"{where}: an empty, '.' or '..' path part; nothing was kept")
        if "\\" in part or any(ord(c) < 32 or ord(c) == 127 for c in part):
            raise InvalidInput(f"{where}: a backslash or control character in its name; "
                               "nothing was kept")
    return parts


def unpack(chunks: Iterable[bytes], dest: str | os.PathLike[str], *, max_bytes: int,
           max_files: int) -> dict[str, int]:
    """Write the archive's files into the empty folder `dest`; returns {"files", "folders",
    "bytes"}. `max_files` bounds the members (files and folders), `max_bytes` their content."""
    for value, param in ((max_bytes, "max_bytes"), (max_files, "max_files")):
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            raise UsageError(f"{param} must be a positive integer")
    root = Path(dest)
    try:
        if not stat.S_ISDIR(os.lstat(root).st_mode) or any(root.iterdir()):
            raise UsageError("the folder to unpack into must be an existing, empty folder")
    except FileNotFoundError:
        raise UsageError("the folder to unpack into does not exist") from None
    source = _Chunks(chunks, max_bytes + (max_files + 2) * _HEADER_ALLOWANCE + tarfile.RECORDSIZE)
    try:
        return _extract(source, root, max_bytes, max_files)
    except BaseException:
        _empty(root)
        raise


def _extract(source: _Chunks, root: Path, max_bytes: int, max_files: int) -> dict[str, int]:
    seen: dict[str, str] = {}  # casefolded path -> "file", "folder" or "parent" (implied)
    files = folders = total = 0
    try:
        with tarfile.open(fileobj=source, mode="r|", tarinfo=_Member) as tar:
            tar.reached_end = False  # type: ignore[attr-defined]
            for index, member in enumerate(tar):
                if index >= max_files:
                    raise InvalidInput(f"archive holds more than {max_files} members; nothing was kept")
                parts = _check_name(member.name, index)
                if member.type not in _ACCEPTED or member.issparse():
                    raise InvalidInput(f"archive member {index}: not a regular file or folder "
                                       "(a link, device, fifo or sparse file); nothing was kept")
                _claim(seen, parts, member.isdir(), index)
                if member.isdir():
                    _mkdirs(root, parts)
                    folders += 1
                    continue
                total += member.size
                if total > max_bytes:
                    raise InvalidInput(f"archive content exceeds {max_bytes} bytes; nothing was kept")
                _mkdirs(root, parts[:-1])
                data = tar.extractfile(member)
                assert data is not None  # a regular file
                _write(root.joinpath(*parts), data, member.size)
                files += 1
            if not tar.reached_end:  # type: ignore[attr-defined]
                raise InvalidInput("archive is truncated (no end-of-archive blocks); nothing was kept")
            _check_tail(tar)
    except (tarfile.TarError, EOFError) as exc:
        raise InvalidInput("archive is truncated or not a tar stream; nothing was kept") from exc
    return {"files": files, "folders": folders, "bytes": total}


def _claim(seen: dict[str, str], parts: tuple[str, ...], is_dir: bool, index: int) -> None:
    """Record a member's name; refuse a name that came before (ignoring case, as some file
    systems do) or a path through a file."""
    for i in range(1, len(parts)):
        if seen.setdefault("/".join(parts[:i]).casefold(), "parent") == "file":
            raise InvalidInput(f"archive member {index}: a path through a file; nothing was kept")
    key = "/".join(parts).casefold()
    if key in seen and not (is_dir and seen[key] == "parent"):
        raise InvalidInput(f"archive member {index}: a name that came before (ignoring case); "
                           "nothing was kept")
    seen[key] = "folder" if is_dir else "file"


def _check_tail(tar: tarfile.TarFile) -> None:
    """After the first end-of-archive block: the second one, then only zero padding."""
    zeros = 0
    while rest := tar.fileobj.read(tarfile.RECORDSIZE):  # type: ignore[union-attr]
        if rest.count(0) != len(rest):
            raise InvalidInput("archive has data after its end; nothing was kept")
        zeros += len(rest)
    if zeros < tarfile.BLOCKSIZE:
        raise InvalidInput("archive is truncated (no end-of-archive blocks); nothing was kept")


def _mkdirs(root: Path, parts: tuple[str, ...]) -> None:
    path = root
    for part in parts:
        path = path / part
        try:
            os.mkdir(path, 0o700)
        except FileExistsError:
            if not stat.S_ISDIR(os.lstat(path).st_mode):
                raise InvalidInput("archive names a folder where a file is; nothing was kept") from None
            continue
        os.chmod(path, 0o700)


def _write(target: Path, data: IO[bytes], size: int) -> None:
    try:
        fd = os.open(target, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW, 0o600)
    except FileExistsError:
        raise InvalidInput("archive names a file twice; nothing was kept") from None
    with os.fdopen(fd, "wb") as out:
        os.fchmod(out.fileno(), 0o600)
        left = size
        try:
            while left:
                block = data.read(min(CHUNK, left))
                if not block:
                    raise InvalidInput("archive is truncated inside a file; nothing was kept")
                out.write(block)
                left -= len(block)
            out.flush()
            os.fsync(out.fileno())
        except OSError as exc:
            if exc.errno in (errno.ENOSPC, errno.EDQUOT):
                raise StorageFull("not enough disk space to unpack the archive") from exc
            raise


def _empty(root: Path) -> None:
    """Remove everything below `root` (what a refused unpack wrote), keeping `root`."""
    for dirpath, dirnames, filenames in os.walk(root, topdown=False):
        for name in filenames:
            os.unlink(os.path.join(dirpath, name))
        for name in dirnames:
            os.rmdir(os.path.join(dirpath, name))
