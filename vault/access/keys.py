"""The key hierarchy (docs/design.md draws it).

    member passphrase --Argon2id--> slot key --AES-KW--> master key (random, 256 bit)
    master key --HKDF("data-key-wrap", vault id, participant id)--> wrapping key
        --AES-KW--> participant data key (random, 256 bit) --C2SP--> that participant's blobs
    master key --HKDF("signing-key-wrap", vault id)--> wrapping key --AES-KW--> Ed25519 seed
    master key --HKDF("vault-secret-wrap", vault id)--> wrapping key --AES-KW--> vault secret
        --HKDF(label, vault id, purpose)--> keyed lab-code tags, per-purpose pseudonym keys

Destroying a participant's wrapped data key erases all of their data
(cryptographic erase, NIST SP 800-88). Rekeying re-wraps keys, never data.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field

from vault import crypto
from vault.crypto import sealing
from vault.errors import AuthenticationFailed, IntegrityError, NotFound
from vault.storage import db as storage
from vault.storage import participants, slots

SLOT_FORMAT = 2
SLOT_MASTER = "master"
SLOT_MEMBER = "member"


def member_key_from_secret(secret: bytes, vault_id: str, member: str, role: str) -> bytes:
    return crypto.derive_key(secret, "member-key", vault_id.encode(), member.encode(),
                             role.encode())


@dataclass(frozen=True)
class Unlocked:
    """What a member's passphrase opened: the key ring (data roles only), their role, and
    their member key (authenticates their notes)."""

    ring: KeyRing | None
    role: str
    member_key: bytes = field(repr=False)
    upgraded: bool = False  # a legacy slot was rewritten with its role bound


@dataclass(frozen=True)
class NewParticipantKey:
    key: bytes  # in memory only, for the first blob written before the row exists
    wrapped: bytes
    commitment: str


class KeyRing:
    """The unlocked master key of one vault, held in memory only while the vault is open."""

    def __init__(self, vault_id: str, master: bytes) -> None:
        self.vault_id = vault_id
        self._master = master
        self._secret = b""

    def __reduce__(self) -> object:
        raise TypeError("key rings are not serialisable")

    # -- slots ------------------------------------------------------------------------------
    #
    # A slot's wrapping key is HKDF(Argon2id(passphrase), vault id, member, role, kind): the
    # role is bound to the slot, so a slot whose role (or member name) was edited no longer
    # unwraps. Roles that read participant data get a "master" slot (wraps the master key);
    # roles that do not (auditors) a "member" slot, which wraps only their member key and
    # so opens nothing of participant data. Slots written before roles were bound ("legacy":
    # the bare Argon2id key wrapped the master key) are rewritten at their member's next
    # unlock.

    @staticmethod
    def _slot_kek(passphrase: str, params: crypto.KdfParams, vault_id: str, member: str,
                  role: str, kind: str) -> bytes:
        root = crypto.passphrase_key(passphrase, params)
        return crypto.derive_key(root, "slot-kek", vault_id.encode(), member.encode(),
                                 role.encode(), kind.encode())

    def member_key(self, member: str, role: str) -> bytes:
        """The key a member's notes are authenticated with (from the vault secret, so it
        survives rekeys; stewards recompute it to check notes)."""
        return member_key_from_secret(self._secret, self.vault_id, member, role)

    def _write_slot(self, conn: storage.Connection, member: str, role: str, passphrase: str,
                    now: str, *, reads_data: bool, replace: bool = False) -> None:
        params = crypto.KdfParams.fresh()
        kind = SLOT_MASTER if reads_data else SLOT_MEMBER
        kek = self._slot_kek(passphrase, params, self.vault_id, member, role, kind)
        secret = self._master if reads_data else self.member_key(member, role)
        doc = json.dumps({"format": SLOT_FORMAT, "kind": kind, "kdf": params.as_dict()},
                         sort_keys=True)
        slots.write_slot(conn, member, role, doc, sealing.wrap_key(kek, secret), now, replace=replace)

    def add_slot(self, conn: storage.Connection, member: str, role: str, passphrase: str,
                 now: str, *, reads_data: bool = True) -> None:
        self._write_slot(conn, member, role, passphrase, now, reads_data=reads_data)

    @classmethod
    def unlock(cls, conn: storage.Connection, vault_id: str, member: str, passphrase: str,
               reads_data: Callable[[str], bool]) -> Unlocked:
        """Check a member's passphrase against their slot.

        Returns the key ring for members whose role reads data, and only the member key
        for the others. A wrong passphrase and an edited slot fail alike."""
        row = slots.slot(conn, member)
        if row is None:
            raise AuthenticationFailed(f"no member '{member}' in this vault")
        doc, wrapped, role, created = json.loads(row[0]), row[1], row[2], row[3]
        if "format" not in doc:  # legacy slot: the bare passphrase key wraps the master key
            params = crypto.KdfParams.from_dict(doc)
            master = sealing.unwrap_master(crypto.passphrase_key(passphrase, params), wrapped)
            ring = cls(vault_id, master)
            ring.load_secret(bytes.fromhex(storage.get_meta(conn, "wrapped_vault_secret")))
            with storage.transaction(conn):
                ring._write_slot(conn, member, role, passphrase, created,
                                 reads_data=reads_data(role), replace=True)
            return Unlocked(ring if reads_data(role) else None, role, ring.member_key(member, role),
                            upgraded=True)
        if doc.get("format") != SLOT_FORMAT or doc.get("kind") not in (SLOT_MASTER, SLOT_MEMBER):
            raise IntegrityError(f"the key slot of member '{member}' has an unknown format")
        params = crypto.KdfParams.from_dict(doc["kdf"])
        kek = cls._slot_kek(passphrase, params, vault_id, member, role, doc["kind"])
        inner = sealing.unwrap_master(kek, wrapped)
        if doc["kind"] == SLOT_MEMBER:
            return Unlocked(None, role, inner)
        if not reads_data(role):
            raise IntegrityError(f"the key slot of member '{member}' does not match its role")
        ring = cls(vault_id, inner)
        ring.load_secret(bytes.fromhex(storage.get_meta(conn, "wrapped_vault_secret")))
        return Unlocked(ring, role, ring.member_key(member, role))

    # -- participant keys ---------------------------------------------------------------------

    def _participant_kek(self, pid: str) -> bytes:
        return crypto.derive_key(
            self._master, "data-key-wrap", self.vault_id.encode(), pid.encode()
        )

    def new_participant_key(self, pid: str) -> NewParticipantKey:
        key = crypto.new_key()
        return NewParticipantKey(
            key=key,
            wrapped=sealing.wrap_key(self._participant_kek(pid), key),
            commitment=crypto.key_commitment(key, self.vault_id.encode(), pid.encode()),
        )

    def participant_key(self, conn: storage.Connection, pid: str) -> bytes:
        """The data key of a participant. Callers: the blob store only."""
        found, wrapped = participants.wrapped_key(conn, pid)
        if not found:
            raise NotFound(f"no participant '{pid}'")
        return self._unwrap_participant_key(pid, wrapped)

    def participant_keys(self, conn: storage.Connection, pids: Iterable[str]) -> dict[str, bytes]:
        """The data keys of many participants, unwrapped in one pass. Caller: `Vault.read_blobs`,
        after the policy engine admitted the reads."""
        wanted = sorted(set(pids))
        rows = participants.wrapped_keys(conn, wanted)
        out = {}
        for pid in wanted:
            if pid not in rows:
                raise NotFound(f"no participant '{pid}'")
            out[pid] = self._unwrap_participant_key(pid, rows[pid])
        return out

    def _unwrap_participant_key(self, pid: str, wrapped: bytes | None) -> bytes:
        if wrapped is None:
            raise NotFound(f"participant '{pid}' was erased; their data cannot be read")
        try:
            return sealing.unwrap_key(self._participant_kek(pid), wrapped)
        except IntegrityError as exc:
            raise IntegrityError(
                f"the data key of participant '{pid}' failed its integrity check"
            ) from exc

    def date_offset(self, conn: storage.Connection, pid: str) -> int | None:
        """The participant's secret date shift in days, or None before their first recording.

        Stored only wrapped under a key derived from their data key (gone when they are erased).
        """
        wrapped = participants.wrapped_date_offset(conn, pid)
        if wrapped is None:
            return None
        kek = crypto.derive_key(self.participant_key(conn, pid), "date-offset-wrap")
        return int.from_bytes(sealing.unwrap_key_padded(kek, wrapped), "big", signed=True)

    def store_date_offset(self, conn: storage.Connection, pid: str, days: int) -> None:
        kek = crypto.derive_key(self.participant_key(conn, pid), "date-offset-wrap")
        wrapped = sealing.wrap_key_padded(kek, days.to_bytes(8, "big", signed=True))
        participants.set_wrapped_date_offset(conn, pid, wrapped)

    def participant_tag(self, conn: storage.Connection, pid: str, label: str, message: bytes) -> str:
        """HMAC under the participant's own data key: links their rows, dies with their key."""
        key = crypto.derive_key(self.participant_key(conn, pid), label)
        return crypto.hmac_sha256(key, message).hex()

    # -- signing key ----------------------------------------------------------------------------

    def _signing_kek(self) -> bytes:
        return crypto.derive_key(self._master, "signing-key-wrap", self.vault_id.encode())

    def wrap_signing_key(self, key: crypto.SigningKey) -> bytes:
        return key.wrapped(self._signing_kek())

    def signing_key(self, wrapped: bytes) -> crypto.SigningKey:
        return crypto.SigningKey.unwrap(self._signing_kek(), wrapped)

    # -- per-purpose secrets (pseudonyms) -----------------------------------------------------

    # -- the vault secret: stable across rekeys; roots keyed tags and pseudonyms -------------

    def _secret_kek(self) -> bytes:
        return crypto.derive_key(self._master, "vault-secret-wrap", self.vault_id.encode())

    def wrap_secret(self, secret: bytes) -> bytes:
        return sealing.wrap_key(self._secret_kek(), secret)

    def load_secret(self, wrapped: bytes) -> None:
        self._secret = sealing.unwrap_key(self._secret_kek(), wrapped)

    def policy_pin(self, version: str) -> str:
        """Keyed tag of the pinned policy version: a policy swapped into the database by anyone
        without the vault's keys (say, one without DP noise) no longer matches it."""
        key = crypto.derive_key(self._secret, "policy-pin", self.vault_id.encode())
        return crypto.hmac_sha256(key, version.encode("ascii")).hex()

    def consent_tag(self, pid: str, number: int, digest: str) -> str:
        """Keyed tag of a participant's newest consent version (number and content digest)."""
        key = crypto.derive_key(self._secret, "consent-head", self.vault_id.encode())
        return crypto.hmac_sha256(key, f"{pid}\n{number}\n{digest}".encode("ascii")).hex()

    def token_tag(self, token_id: str, member: str, role: str, expires_at: str,
                  secret: bytes) -> str:
        """Keyed tag of a member token, binding its member, role and expiry: a row edited to
        widen a role or extend an expiry no longer matches, and a copy of the files (without
        the vault secret) cannot test guesses offline."""
        key = crypto.derive_key(self._secret, "member-token", self.vault_id.encode())
        bound = f"{token_id}\n{member}\n{role}\n{expires_at}\n".encode("ascii")
        return crypto.hmac_sha256(key, bound + secret).hex()

    def lab_code_tag(self, code: str) -> str:
        """Keyed tag of a lab participant code: finds duplicates without storing the code."""
        key = crypto.derive_key(self._secret, "lab-code-tag", self.vault_id.encode())
        return crypto.hmac_sha256(key, code.encode("utf-8")).hex()

    def purpose_key(self, label: str, purpose: str) -> bytes:
        """A key bound to one purpose, e.g. for keyed pseudonyms (one domain per purpose)."""
        return crypto.derive_key(self._secret, label, self.vault_id.encode(), purpose.encode())

    # -- rekey ----------------------------------------------------------------------------------

    def rekeyed(self, conn: storage.Connection, member: str, role: str, passphrase: str,
                wrapped_signing: bytes, now: str) -> tuple[KeyRing, bytes, bytes]:
        """Re-wrap every key under a fresh master key (inside the caller's transaction).

        Every other member's master slot is dropped: their passphrases wrap the old
        master key, and only they can choose a new one. Member slots (roles that read no
        data) wrap no master key and stay.
        """
        fresh = KeyRing(self.vault_id, crypto.new_key())
        fresh._secret = self._secret
        signing = self.signing_key(wrapped_signing)
        for pid, wrapped in participants.living_wrapped_keys(conn):
            key = sealing.unwrap_key(self._participant_kek(pid), wrapped)
            participants.set_wrapped_key(conn, pid, sealing.wrap_key(fresh._participant_kek(pid), key))
        slots.drop_slots_except_kind(conn, SLOT_MEMBER)
        slots.drop_slot(conn, member)
        fresh._write_slot(conn, member, role, passphrase, now, reads_data=True)
        return fresh, fresh.wrap_signing_key(signing), fresh.wrap_secret(self._secret)
