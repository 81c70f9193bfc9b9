"""The encrypted blob store: the only module that turns vault ciphertext into plaintext.

Each blob is one C2SP chunked-encryption message under its participant's data
key, with the context binding vault id, participant id and blob id, so a blob
copied into another participant's or another blob's place fails the key
commitment before any chunk is decrypted.

Writes are atomic: ciphertext goes to a temporary file inside the vault, is
fsynced, renamed into place and its directory fsynced; only then does the
caller commit the metadata row (with its audit entry) in one transaction. A
crash before the commit leaves at most an orphan file, which `recover()`
removes when the vault is next opened for writing; no row ever points at a
missing or partial blob.
"""

from __future__ import annotations

import errno
import os
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

from vault import crypto
from vault.crypto import sealing
from vault.errors import IntegrityError, PolicyRefusal, StorageFull
from vault.policy.engine import Admission
from vault.storage.files import fsync_path

BLOB_DIR = "blobs"
TMP_DIR = "tmp"
_SUFFIX = ".mwb"
_WRITE_BUFFER = 1 << 20
_WHOLE_READ = 1 << 20  # blobs up to this size are read and authenticated in one piece


@dataclass(frozen=True)
class BlobInfo:
    blob_id: str
    pid: str
    kind: str
    plain_size: int
    stored_size: int


def blob_context(vault_id: str, pid: str, blob_id: str) -> bytes:
    """The C2SP context: binds a ciphertext to its vault, participant and slot."""
    parts = (b"mindward/v1/blob", vault_id.encode(), pid.encode(), blob_id.encode())
    return b"\x00".join(parts)




def shard(blob_id: str) -> str:
    """The sub-folder of a blob: two characters of its random part ("b-" is the same for all)."""
    return blob_id[2:4]


class BlobStore:
    def __init__(self, root: Path, vault_id: str) -> None:
        self.root = root
        self.vault_id = vault_id
        self.blob_dir = root / BLOB_DIR
        self._blob_dir_str = str(self.blob_dir)
        self.tmp_dir = root / TMP_DIR

    def create_dirs(self) -> None:
        for d in (self.blob_dir, self.tmp_dir):
            d.mkdir(mode=0o700, exist_ok=True)

    def path(self, blob_id: str) -> Path:
        return self.blob_dir / shard(blob_id) / (blob_id + _SUFFIX)

    # -- writing --------------------------------------------------------------------------------

    def write(self, key: bytes, pid: str, blob_id: str, kind: str,
              chunks: Iterable[bytes]) -> BlobInfo:
        """Encrypt `chunks` into a new blob file; durable and in place when it returns."""
        enc = sealing.ChunkedEncryptor(key, blob_context(self.vault_id, pid, blob_id))
        tmp = self.tmp_dir / (crypto.random_id(8) + ".part")
        final = self.path(blob_id)
        stored = 0
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
            with os.fdopen(fd, "wb", buffering=0) as out:
                pending = [enc.header]
                size = len(enc.header)
                for chunk in chunks:
                    sealed = enc.update(chunk)
                    if sealed:
                        pending.append(sealed)
                        size += len(sealed)
                    if size >= _WRITE_BUFFER:
                        stored += out.write(b"".join(pending))
                        pending, size = [], 0
                pending.append(enc.finalize())
                stored += out.write(b"".join(pending))
                os.fsync(out.fileno())
            final.parent.mkdir(mode=0o700, exist_ok=True)
            os.replace(tmp, final)
            fsync_path(final.parent)
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            if exc.errno in (errno.ENOSPC, errno.EDQUOT):
                raise StorageFull("not enough disk space for this blob; nothing was stored") from exc
            raise
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
        return BlobInfo(blob_id, pid, kind, enc.plaintext_length, stored)

    def discard(self, blob_id: str) -> None:
        """Remove a blob file whose metadata row was not committed (or was erased)."""
        path = self.path(blob_id)
        path.unlink(missing_ok=True)
        if path.parent.exists():
            fsync_path(path.parent)

    def recover(self, known_ids: set[str]) -> int:
        """Remove temporary files and blobs with no committed row; returns how many.

        A blob found in another sub-folder than `shard` names (vaults written before
        blobs were sharded by their random part all used "b-/") is moved into place.
        """
        removed = 0
        for tmp in self.tmp_dir.glob("*.part"):
            tmp.unlink(missing_ok=True)
            removed += 1
        moved: set[Path] = set()
        for path in self.blob_dir.glob("*/*" + _SUFFIX):
            blob_id = path.name[: -len(_SUFFIX)]
            if blob_id not in known_ids:
                path.unlink(missing_ok=True)
                removed += 1
            elif path.parent.name != shard(blob_id):
                target = self.path(blob_id)
                target.parent.mkdir(mode=0o700, exist_ok=True)
                os.replace(path, target)
                moved |= {path.parent, target.parent}
        for directory in sorted(moved):
            fsync_path(directory)
            if directory.name.endswith("-") and not any(directory.iterdir()):
                directory.rmdir()  # the old shared folder, now empty
                fsync_path(self.blob_dir)
        return removed

    # -- reading (the one door's back room: callers must hold a grant) --------------------------

    def _open(self, blob_id: str) -> int:
        # a plain string path and a raw descriptor: per-read costs show when an export reads 10^4 blobs
        path = os.path.join(self._blob_dir_str, blob_id[2:4], blob_id + _SUFFIX)  # shard()
        try:
            return os.open(path, os.O_RDONLY)
        except FileNotFoundError as exc:
            raise IntegrityError(f"blob '{blob_id}' is missing from the vault") from exc

    def plaintext(self, admission: Admission, key: bytes, pid: str, blob_id: str,
                  category: str) -> Iterator[bytes]:
        """The one door: authenticated plaintext of a blob, only under an admission that the
        policy engine issued for this participant and category (live consent included).

        Any tampering raises IntegrityError and no unauthenticated byte is handed out.
        """
        if not isinstance(admission, Admission) or not admission.covers(pid, category):
            raise PolicyRefusal("reading participant data needs a grant from the policy engine")
        return self._decrypt(key, pid, blob_id)

    def _decrypt(self, key: bytes, pid: str, blob_id: str) -> Iterator[bytes]:
        context = blob_context(self.vault_id, pid, blob_id)
        fd = self._open(blob_id)
        try:
            size = os.fstat(fd).st_size
            if size <= _WHOLE_READ:  # a score batch: one read, one check
                parts = []
                while block := os.read(fd, size + 1):  # to the end, even if the file grew
                    parts.append(block)
                yield sealing.chunked_decrypt(key, context, b"".join(parts))
                return
            with os.fdopen(fd, "rb", buffering=0) as fh:  # unbuffered: large readinto()s
                fd = -1  # closed by the file object from here on
                yield from sealing.ChunkedDecryptor(key, context, fh)
        finally:
            if fd >= 0:
                os.close(fd)

    def authenticate(self, key: bytes, pid: str, blob_id: str, plain_size: int) -> None:
        """Check every chunk's tag and the length; no plaintext leaves this function."""
        total = 0
        for chunk in self._decrypt(key, pid, blob_id):
            total += len(chunk)
        if total != plain_size:
            raise IntegrityError(f"blob '{blob_id}' has the wrong length")

