"""The Vault facade: the only thing the CLI calls, and the only reader of the clock."""

from __future__ import annotations

import fcntl
import os
import shutil
import sqlite3
import time
from collections.abc import Iterable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from vault import audit, crypto, storage
from vault.errors import (
    AuthenticationFailed,
    Conflict,
    IntegrityError,
    NotFound,
    UsageError,
)
from vault.keys import KeyRing
from vault.store import BlobInfo, BlobStore

LOCK_NAME = "lock"
_LOCK_WAIT_S = 10.0


def utc_now(now: datetime | None = None) -> str:
    """ISO 8601 UTC to the second: the one timestamp format of the vault."""
    moment = now or datetime.now(UTC)
    if moment.tzinfo is None:
        raise UsageError("timestamps must carry a time zone")
    return moment.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _require_vault(path: Path) -> None:
    if not (path / storage.DB_NAME).is_file():
        raise NotFound(f"no vault at {path} (create one with 'mindward init')")


def _take_lock(path: Path) -> int:
    fd = os.open(path / LOCK_NAME, os.O_RDWR | os.O_CREAT, 0o600)
    deadline = time.monotonic() + _LOCK_WAIT_S
    while True:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return fd
        except BlockingIOError:
            if time.monotonic() > deadline:
                os.close(fd)
                raise Conflict("the vault is busy: another mindward process has it open") from None
            time.sleep(0.05)


def _check_passphrase(passphrase: str) -> None:
    if len(passphrase) < 12:
        raise UsageError("choose a passphrase of at least 12 characters")


class Vault:
    """An unlocked vault. Open with `Vault.open`, create with `Vault.init`; close when done."""

    def __init__(self, path: Path, conn: sqlite3.Connection, keys: KeyRing, member: str,
                 role: str, lock_fd: int) -> None:
        self.path = path
        self._conn = conn
        self._keys = keys
        self.member = member
        self.role = role
        self._lock_fd = lock_fd
        self.vault_id = keys.vault_id
        self._signing = keys.signing_key(bytes.fromhex(storage.get_meta(conn, "wrapped_signing_key")))
        self._store = BlobStore(path, self.vault_id)
        self._audit = audit.AuditLog(conn, self.vault_id)
        self._closed = False

    # -- lifecycle ------------------------------------------------------------------------------

    @classmethod
    def init(cls, path: Path, passphrase: str, *, member: str = "steward",
             now: datetime | None = None) -> Vault:
        """Create a new vault at `path` (atomically: all of it or nothing)."""
        _check_passphrase(passphrase)
        path = Path(path)
        if path.exists() and any(path.iterdir()):
            raise Conflict(f"{path} exists and is not empty; refusing to create a vault there")
        at = utc_now(now)
        staging = path.parent / f".{path.name}.creating-{crypto.random_id(6)}"
        staging.mkdir(mode=0o700, parents=True)
        try:
            cls._create(staging, passphrase, member, at)
            if path.exists():
                path.rmdir()
            os.replace(staging, path)
        except BaseException:
            shutil.rmtree(staging, ignore_errors=True)
            raise
        return cls.open(path, passphrase, member=member, now=now)

    @staticmethod
    def _create(root: Path, passphrase: str, member: str, at: str) -> None:
        vault_id = crypto.random_id(16)
        master = crypto.new_key()
        ring = KeyRing(vault_id, master)
        signing = crypto.SigningKey.generate()
        conn = storage.connect(root)
        try:
            storage.create_schema(conn)
            BlobStore(root, vault_id).create_dirs()
            with storage.transaction(conn):
                for key, value in {
                    "vault_id": vault_id, "schema_version": str(storage.SCHEMA_VERSION),
                    "created_at": at, "signing_public_key": signing.public_key.hex(),
                    "wrapped_signing_key": ring.wrap_signing_key(signing).hex(),
                }.items():
                    storage.set_meta(conn, key, value)
                ring.add_slot(conn, member, "steward", passphrase, at)
                log = audit.AuditLog(conn, vault_id)
                log.append({"actor": member, "action": "vault.init", "decision": "done",
                            "details": {"fingerprint": crypto.fingerprint(signing.public_key)}}, at)
                log.sign_head(signing, at)
        finally:
            conn.close()

    @classmethod
    def open(cls, path: Path, passphrase: str, *, member: str = "steward",
             now: datetime | None = None) -> Vault:
        """Unlock a vault for `member`; cleans up after any interrupted write."""
        path = Path(path)
        _require_vault(path)
        lock_fd = _take_lock(path)
        conn: sqlite3.Connection | None = None
        try:
            conn = storage.connect(path)
            vault_id = _check_schema(conn)
            keys, role = KeyRing.unlock(conn, vault_id, member, passphrase)
            vault = cls(path, conn, keys, member, role, lock_fd)
        except BaseException:
            if conn is not None:
                conn.close()
            os.close(lock_fd)
            raise
        vault._recover()
        return vault

    def _recover(self) -> None:
        known = {r[0] for r in self._conn.execute("SELECT blob_id FROM blobs")}
        self._store.create_dirs()
        self._store.recover(known)

    def close(self, now: datetime | None = None) -> None:
        """Sign a tree head over any new entries, then release the vault."""
        if self._closed:
            return
        try:
            head = self._audit.latest_head()
            if head is None or head.tree_size < self._audit.size:
                with storage.transaction(self._conn):
                    self._audit.sign_head(self._signing, utc_now(now))
        finally:
            self._closed = True
            self._conn.close()
            os.close(self._lock_fd)

    def __enter__(self) -> Vault:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __reduce__(self) -> object:
        raise TypeError("an open vault is not serialisable")

    # -- facts ----------------------------------------------------------------------------------

    @property
    def public_key(self) -> bytes:
        return self._signing.public_key

    def info(self) -> dict[str, Any]:
        return {**describe(self.path), "member": self.member, "role": self.role}

    # -- keys -----------------------------------------------------------------------------------

    def rekey(self, new_passphrase: str, *, now: datetime | None = None) -> dict[str, Any]:
        """New master key and new passphrase for this member; re-wraps keys, never data."""
        _check_passphrase(new_passphrase)
        at = utc_now(now)
        wrapped_signing = bytes.fromhex(storage.get_meta(self._conn, "wrapped_signing_key"))
        with storage.transaction(self._conn):
            others = self._conn.execute(
                "SELECT COUNT(*) FROM keyslots WHERE member != ?", (self.member,)).fetchone()[0]
            fresh, rewrapped = self._keys.rekeyed(
                self._conn, self.member, self.role, new_passphrase, wrapped_signing, at)
            storage.set_meta(self._conn, "wrapped_signing_key", rewrapped.hex())
            count = self._conn.execute(
                "SELECT COUNT(*) FROM participants WHERE wrapped_key IS NOT NULL").fetchone()[0]
            self._audit.append({"actor": self.member, "action": "vault.rekey", "decision": "done",
                                "details": {"keys_rewrapped": count, "slots_dropped": others}}, at)
        self._keys = fresh
        return {"keys_rewrapped": count, "member_slots_dropped": others}

    # -- participants and blobs -----------------------------------------------------------------

    def _require_steward(self) -> None:
        if self.role != "steward":
            raise AuthenticationFailed(f"member '{self.member}' is not a steward")

    def new_participant(self, *, now: datetime | None = None) -> str:
        """Create a participant with a fresh data key; returns their random id."""
        self._require_steward()
        at = utc_now(now)
        pid = "p-" + crypto.random_id(8)
        key = self._keys.new_participant_key(pid)
        with storage.transaction(self._conn):
            self._conn.execute(
                "INSERT INTO participants (pid, wrapped_key, key_commitment, created_at) "
                "VALUES (?, ?, ?, ?)", (pid, key.wrapped, key.commitment, at))
            self._audit.append({"actor": self.member, "action": "participant.create",
                                "subjects": [pid], "decision": "done"}, at)
        return pid

    def put_blob(self, pid: str, kind: str, chunks: Iterable[bytes], *,
                 now: datetime | None = None, details: dict[str, Any] | None = None) -> BlobInfo:
        """Encrypt and store a blob for `pid`: file first, then row and audit entry at once."""
        self._require_steward()
        at = utc_now(now)
        key = self._keys.participant_key(self._conn, pid)
        blob_id = "b-" + crypto.random_id(12)
        info = self._store.write(key, pid, blob_id, kind, chunks)
        try:
            with storage.transaction(self._conn):
                self._conn.execute(
                    "INSERT INTO blobs (blob_id, pid, kind, plain_size, stored_size, created_at) "
                    "VALUES (?, ?, ?, ?, ?, ?)",
                    (blob_id, pid, kind, info.plain_size, info.stored_size, at))
                self._audit.append({"actor": self.member, "action": "blob.store",
                                    "subjects": [pid], "decision": "done",
                                    "details": {"blob": blob_id, "kind": kind, **(details or {})}},
                                   at)
        except BaseException:
            self._store.discard(blob_id)
            raise
        return info

    def blobs(self, pid: str | None = None) -> list[dict[str, Any]]:
        sql = "SELECT blob_id, pid, kind, plain_size, stored_size, created_at FROM blobs"
        rows = self._conn.execute(sql + (" WHERE pid = ?" if pid else ""), (pid,) if pid else ())
        cols = ("blob_id", "pid", "kind", "plain_size", "stored_size", "created_at")
        return [dict(zip(cols, r, strict=True)) for r in rows]

    # -- verification and the audit log ---------------------------------------------------------

    def verify(self, *, trusted: list[audit.TreeHead] | None = None) -> dict[str, Any]:
        """Check the audit log and authenticate every stored blob (no plaintext leaves)."""
        report = audit.verify_log(self._conn, self.public_key, trusted or [])
        bad: list[str] = []
        rows = self._conn.execute(
            "SELECT b.blob_id, b.pid, b.plain_size FROM blobs b JOIN participants p "
            "ON p.pid = b.pid WHERE p.wrapped_key IS NOT NULL").fetchall()
        for blob_id, pid, size in rows:
            try:
                self._store.authenticate(self._keys.participant_key(self._conn, pid), pid,
                                         blob_id, size)
            except IntegrityError:
                bad.append(blob_id)
        return {"audit": report.as_dict(), "blobs_checked": len(rows), "blobs_failed": bad,
                "ok": report.ok and not bad}

    def audit_entries(self, start: int = 0, limit: int | None = None) -> list[dict[str, Any]]:
        return self._audit.entries(start, limit)

    def sign_head(self, *, now: datetime | None = None) -> audit.TreeHead:
        with storage.transaction(self._conn):
            return self._audit.sign_head(self._signing, utc_now(now))



def _check_schema(conn: sqlite3.Connection) -> str:
    try:
        version = int(storage.get_meta(conn, "schema_version"))
        vault_id = storage.get_meta(conn, "vault_id")
    except sqlite3.DatabaseError as exc:
        raise IntegrityError("the vault database is unreadable or not a vault") from exc
    if version != storage.SCHEMA_VERSION:
        raise IntegrityError(f"vault schema {version} is not supported by this version")
    return vault_id


def _readonly(path: Path) -> sqlite3.Connection:
    _require_vault(Path(path))
    try:
        conn = storage.connect(Path(path), readonly=True)
        _check_schema(conn)
    except sqlite3.DatabaseError as exc:
        raise IntegrityError("the vault database is unreadable or not a vault") from exc
    return conn


def describe(path: Path) -> dict[str, Any]:
    """Public facts about a vault; needs no passphrase."""
    conn = _readonly(path)
    try:
        public = bytes.fromhex(storage.get_meta(conn, "signing_public_key"))

        def count(sql: str) -> int:
            return int(conn.execute(sql).fetchone()[0])

        head = conn.execute(
            "SELECT body, signature FROM tree_heads ORDER BY tree_size DESC LIMIT 1").fetchone()
        return {
            "path": str(path), "vault_id": storage.get_meta(conn, "vault_id"),
            "created_at": storage.get_meta(conn, "created_at"),
            "schema_version": storage.SCHEMA_VERSION,
            "public_key": public.hex(), "fingerprint": crypto.fingerprint(public),
            "participants": count("SELECT COUNT(*) FROM participants WHERE wrapped_key IS NOT NULL"),
            "participants_erased": count("SELECT COUNT(*) FROM participants WHERE wrapped_key IS NULL"),
            "blobs": count("SELECT COUNT(*) FROM blobs"),
            "audit_entries": count("SELECT COUNT(*) FROM audit_log"),
            "latest_tree_head": None if head is None else audit.TreeHead.from_row(*head).to_dict(),
        }
    finally:
        conn.close()


def parse_public_key(text: str) -> bytes:
    try:
        key = bytes.fromhex(text.strip())
    except ValueError:
        key = b""
    if len(key) != 32:
        raise UsageError("a public key is 64 hex digits (see 'mindward info')")
    return key


def verify_audit(path: Path, *, public_key: bytes | None = None,
                 trusted: list[audit.TreeHead] | None = None) -> audit.VerifyReport:
    """Verify a vault's audit log with its public key alone (no passphrase).

    Without `public_key` the key stored in the vault is used, which only
    proves internal consistency: pass the key you hold from 'mindward info'.
    """
    conn = _readonly(path)
    try:
        stored = bytes.fromhex(storage.get_meta(conn, "signing_public_key"))
        report = audit.verify_log(conn, public_key or stored, trusted or [])
        if public_key is None:
            report.notes.append("checked against the public key stored in the vault; "
                                "pass --key with the key you hold to rule out a swapped key")
        return report
    finally:
        conn.close()


def read_tree_head(text: str) -> audit.TreeHead:
    import json

    try:
        return audit.TreeHead.from_dict(json.loads(text))
    except (ValueError, TypeError) as exc:
        raise IntegrityError("the tree head file is not valid JSON") from exc


def prove(path: Path, seq: int) -> dict[str, Any]:
    """Inclusion proof of entry `seq` under the latest signed tree head; no passphrase."""
    conn = _readonly(path)
    try:
        return audit.AuditLog(conn, storage.get_meta(conn, "vault_id")).inclusion_bundle(seq)
    finally:
        conn.close()


def verify_proof(bundle: dict[str, Any], public_key: bytes) -> bool:
    """Offline check of a proof from `prove`, with the vault's public key alone."""
    return audit.verify_inclusion_bundle(bundle, public_key)
