"""The one door: the only holder of the vault's key ring and blob store.

Every plaintext read takes a grant from the policy engine, is admitted against live
consent and audited before a byte is decrypted; every new key, keyed tag, key slot and
the cryptographic erase of a participant (destroying their wrapped data key, NIST SP
800-88) go through here. Nothing outside vault.access sees a key ring, a data key or a
decryptor: callers get ciphertext facts (`BlobInfo`), tags, pseudonyms and admitted reads.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from vault import crypto
from vault.access.blobs import BlobInfo, BlobStore
from vault.access.keys import KeyRing
from vault.errors import IntegrityError, NotFound, UsageError
from vault.policy.engine import Grant, PolicyEngine
from vault.storage import db as storage
from vault.storage import participants as rows
from vault.storage.db import Connection

__all__ = ["BlobInfo", "Door", "NewParticipant", "Opened", "new_vault_keys", "unlock"]

PSEUDONYM_HEX = 20  # 80 bits: collisions are negligible for any study-sized cohort

Read = tuple[str, str, Iterator[bytes]]


@dataclass(frozen=True)
class Opened:
    """What a member's passphrase opened: the door (roles that read data only), their role,
    and their member key (authenticates their notes)."""

    door: Door | None
    role: str
    member_key: bytes = field(repr=False)
    upgraded: bool = False  # a legacy slot was rewritten with its role bound


@dataclass(frozen=True)
class NewParticipant:
    """A fresh participant's wrapped key and commitment (the key itself stays in the door),
    and their first blob when one was written."""

    wrapped: bytes
    commitment: str
    blob: BlobInfo | None = None


def unlock(conn: Connection, root: Path, vault_id: str, member: str, passphrase: str,
           reads_data: Callable[[str], bool]) -> Opened:
    """Check a member's passphrase against their slot; a wrong passphrase and an edited
    slot fail alike. Members whose role reads no data get no door."""
    unlocked = KeyRing.unlock(conn, vault_id, member, passphrase, reads_data)
    door = None if unlocked.ring is None else Door(conn, root, unlocked.ring)
    return Opened(door, unlocked.role, unlocked.member_key, unlocked.upgraded)


def new_vault_keys(root: Path, conn: Connection, member: str, passphrase: str, at: str,
                   policy_version: str) -> tuple[str, crypto.SigningKey]:
    """A new vault's keys (inside the caller's transaction): master key, signing key, vault
    secret, the policy pin and the first steward's slot; returns (vault id, signing key)."""
    vault_id = crypto.random_id(16)
    ring = KeyRing(vault_id, crypto.new_key())
    signing = crypto.SigningKey.generate()
    wrapped_secret = ring.wrap_secret(crypto.new_key())
    BlobStore(root, vault_id).create_dirs()
    for key, value in {
        "vault_id": vault_id, "signing_public_key": signing.public_key.hex(),
        "wrapped_signing_key": ring.wrap_signing_key(signing).hex(),
        "wrapped_vault_secret": wrapped_secret.hex(),
    }.items():
        storage.set_meta(conn, key, value)
    ring.load_secret(wrapped_secret)
    storage.set_meta(conn, "policy_pin", ring.policy_pin(policy_version))
    ring.add_slot(conn, member, "steward", passphrase, at)
    return vault_id, signing


class Door:
    """The one door of an open vault (built by `unlock`)."""

    def __init__(self, conn: Connection, root: Path, ring: KeyRing) -> None:
        self._conn = conn
        self._ring = ring
        self._blobs = BlobStore(root, ring.vault_id)
        self._engine: Callable[[], PolicyEngine] | None = None
        self._audit: Callable[[list[dict[str, Any]]], None] | None = None

    def attach(self, engine: Callable[[], PolicyEngine],
               audit_batch: Callable[[list[dict[str, Any]]], None]) -> None:
        """Bind the door, once, to its vault's policy engine (the current one, read at each
        read: the one that mints this session's grants) and audit sink. Reads admitted by any
        other engine (one a caller built with its own consent loader) never reach a key."""
        if self._engine is not None:
            raise UsageError("this door is bound to its vault already")
        self._engine, self._audit = engine, audit_batch

    def __reduce__(self) -> object:
        raise TypeError("the door is not serialisable")

    @property
    def vault_id(self) -> str:
        return self._ring.vault_id

    def signer(self) -> crypto.SigningKey:
        """The vault's signing key, unwrapped from the database."""
        return self._ring.signing_key(bytes.fromhex(storage.get_meta(self._conn, "wrapped_signing_key")))

    # -- blob files (ciphertext only) -----------------------------------------------------------

    def recover_files(self, known: set[str]) -> int:
        """Folders in place; temporary files and blobs with no committed row removed."""
        self._blobs.create_dirs()
        return self._blobs.recover(known)

    def blob_path(self, blob_id: str) -> Path:
        return self._blobs.path(blob_id)

    @property
    def tmp_dir(self) -> Path:
        return self._blobs.tmp_dir

    def write_blob(self, pid: str, kind: str, chunks: Iterable[bytes]) -> BlobInfo:
        """Encrypt `chunks` under the participant's key into a new blob file (durable when this
        returns; the caller commits its row, or calls `discard`)."""
        key = self._ring.participant_key(self._conn, pid)
        return self._blobs.write(key, pid, "b-" + crypto.random_id(12), kind, chunks)

    def discard(self, blob_id: str) -> None:
        self._blobs.discard(blob_id)

    # -- participants -----------------------------------------------------------------------------

    def new_participant(self, pid: str, first: tuple[str, Iterable[bytes]] | None = None
                        ) -> NewParticipant:
        """A fresh data key for `pid`, with their first blob (`(kind, chunks)`) written under it
        before their row exists."""
        key = self._ring.new_participant_key(pid)
        blob = None
        if first is not None:
            blob = self._blobs.write(key.key, pid, "b-" + crypto.random_id(12), first[0], first[1])
        return NewParticipant(key.wrapped, key.commitment, blob)

    def shred(self, pid: str, at: str) -> None:
        """The cryptographic erase: destroy the participant's wrapped data key (inside the
        caller's transaction); every blob under it is unreadable from then on."""
        rows.erase_key(self._conn, pid, at)

    def readable(self, pid: str) -> bool:
        """Whether the participant's data key still unwraps (False once erased)."""
        try:
            self._ring.participant_key(self._conn, pid)
        except (NotFound, IntegrityError):
            return False
        return True

    def date_offset(self, pid: str) -> int | None:
        return self._ring.date_offset(self._conn, pid)

    def store_date_offset(self, pid: str, days: int) -> None:
        self._ring.store_date_offset(self._conn, pid, days)

    # -- reads ----------------------------------------------------------------------------------

    def read(self, grant: Grant, blob_ids: list[str], *, for_noise: bool) -> list[Read]:
        """Plaintext of many blobs: one live admission by the vault's engine, one audit batch,
        then (blob_id, participant id, chunks) in the order given."""
        if self._engine is None or self._audit is None:
            raise UsageError("this door is not bound to a vault")
        engine, audit_batch = self._engine(), self._audit
        record = engine.record(grant)
        found = rows.blob_owners(self._conn, blob_ids)
        missing = [b for b in blob_ids if b not in found]
        if missing:
            raise NotFound(f"no blob '{missing[0]}'")
        admission = engine.admit_many(grant, [found[b] for b in blob_ids], for_noise=for_noise)
        audit_batch([{"actor": record.request.actor, "action": "access.read",
                      "purpose": record.request.purpose,
                      "subjects": sorted({found[b][0] for b in blob_ids}), "decision": "permit",
                      "details": {"grant": record.grant_id, "blobs": len(blob_ids),
                                  "categories": sorted({found[b][1] for b in blob_ids}),
                                  **({"to": "release-mechanism"} if for_noise else {})}}])
        keys = self._ring.participant_keys(self._conn, (pid for pid, _ in found.values()))
        return [(blob_id, found[blob_id][0],
                 self._blobs.plaintext(admission, keys[found[blob_id][0]], found[blob_id][0],
                                       blob_id, found[blob_id][1]))
                for blob_id in blob_ids]

    def authenticate_all(self) -> tuple[int, list[str]]:
        """Check every living participant's blobs (tags and lengths; no plaintext leaves);
        returns (how many checked, the ids that failed)."""
        bad: list[str] = []
        living = rows.living_blobs(self._conn)
        for blob_id, pid, size in living:
            try:
                self._blobs.authenticate(self._ring.participant_key(self._conn, pid), pid,
                                         blob_id, size)
            except IntegrityError:
                bad.append(blob_id)
        return len(living), bad

    # -- keyed tags and pseudonyms --------------------------------------------------------------

    def lab_code_tag(self, code: str) -> str:
        return self._ring.lab_code_tag(code)

    def token_tag(self, token_id: str, member: str, role: str, expires_at: str,
                  secret: bytes) -> str:
        return self._ring.token_tag(token_id, member, role, expires_at, secret)

    def consent_tag(self, pid: str, number: int, digest: str) -> str:
        return self._ring.consent_tag(pid, number, digest)

    def policy_pin(self, version: str) -> str:
        return self._ring.policy_pin(version)

    def member_key(self, member: str, role: str) -> bytes:
        return self._ring.member_key(member, role)

    def participant_tag(self, pid: str, label: str, message: bytes) -> str:
        """HMAC under the participant's own data key: links their rows, dies with their key."""
        return self._ring.participant_tag(self._conn, pid, label, message)

    def pseudonyms(self, purpose: str, pids: Iterable[str]) -> dict[str, str]:
        """HMAC-SHA256 of each id under a key bound to the purpose (ENISA: keyed hashing, one
        domain per purpose): stable within a purpose, unlinkable across purposes."""
        key = self._ring.purpose_key("pseudonym", purpose)
        return {pid: crypto.hmac_sha256(key, pid.encode()).hex()[:PSEUDONYM_HEX] for pid in pids}

    # -- key slots ------------------------------------------------------------------------------

    def add_slot(self, member: str, role: str, passphrase: str, at: str, *,
                 reads_data: bool) -> None:
        self._ring.add_slot(self._conn, member, role, passphrase, at, reads_data=reads_data)

    def rekey(self, member: str, role: str, passphrase: str, at: str) -> Callable[[], None]:
        """A fresh master key (inside the caller's transaction): every key re-wrapped, other
        members' master slots dropped. Returns the swap to call once the transaction committed
        (until then the ring in use stays the old one)."""
        wrapped_signing = bytes.fromhex(storage.get_meta(self._conn, "wrapped_signing_key"))
        fresh, rewrapped, secret = self._ring.rekeyed(
            self._conn, member, role, passphrase, wrapped_signing, at)
        storage.set_meta(self._conn, "wrapped_signing_key", rewrapped.hex())
        storage.set_meta(self._conn, "wrapped_vault_secret", secret.hex())

        def swap() -> None:
            self._ring = fresh

        return swap
