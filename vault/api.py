"""The Vault facade: the only thing the CLI calls, and the only reader of the clock."""

from __future__ import annotations

import fcntl
import json
import os
import shutil
import time
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field, replace
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from types import MappingProxyType
from typing import TYPE_CHECKING, Any, Protocol

from vault import crypto
from vault.access import door as access
from vault.access.door import BlobInfo, Opened
from vault.audit import log as audit
from vault.audit import notes
from vault.errors import (
    Conflict,
    IntegrityError,
    NotFound,
    PolicyRefusal,
    UsageError,
)
from vault.formats import strictjson
from vault.policy.decide import CohortDecision, Request
from vault.policy.engine import Grant, PolicyEngine
from vault.policy.policyset import PolicySet, load_default_policy, load_policy_dir
from vault.services import auditing, blobs, consent, members, policy_apply, rekeying, tokens
from vault.services.context import Context
from vault.services.members import check_member_name, check_passphrase, reads_data
from vault.storage import audit_rows, counts, participants, registry, slots
from vault.storage import db as storage
from vault.storage import tokens as token_rows
from vault.storage.db import Connection, DatabaseError
from vault.times import iso_utc, parse_utc

if TYPE_CHECKING:
    from vault.formats.edf_header import SupportsRead

LOCK_NAME = "lock"
_LOCK_WAIT_S = 10.0


class Clock(Protocol):
    def now(self) -> datetime: ...


class SystemClock:
    """The real clock: what every vault reads unless a test injects another at open."""

    def now(self) -> datetime:
        return datetime.now(UTC)


SYSTEM_CLOCK = SystemClock()


def moment(clock: Clock | None = None) -> datetime:
    """What `clock` (the system's by default) reads, checked and in UTC: this module is the
    only reader of the clock."""
    value = (clock or SYSTEM_CLOCK).now()
    if not isinstance(value, datetime) or value.tzinfo is None:
        raise UsageError("timestamps must carry a time zone")
    return value.astimezone(UTC)


def _require_vault(path: Path) -> None:
    if not (path / storage.DB_NAME).is_file():
        raise NotFound(f"no vault at {path}", hint="create")


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


CLOCK_ALLOWANCE = timedelta(minutes=2)


def _newest_entry_time(conn: Connection) -> datetime:
    raw = audit_rows.newest_entry(conn)
    try:
        stamp = json.loads(raw)["at"] if raw is not None else None  # type: ignore[arg-type]
        return parse_utc(stamp)
    except (ValueError, TypeError, KeyError):
        return datetime.min.replace(tzinfo=UTC)


@dataclass(eq=False)
class _Shared:
    """What an open vault and its member views share: one connection, door, log and pinned
    policy (see `Vault.authenticate`)."""

    path: Path
    clock: Clock
    conn: Connection
    door: access.Door
    lock_fd: int
    signing: crypto.SigningKey
    audit: audit.AuditLog | None = None
    policy: PolicySet | None = None
    engine: PolicyEngine | None = None
    gate: tokens.AuthGate = field(default_factory=tokens.AuthGate)
    closed: bool = False

    def __reduce__(self) -> object:
        raise TypeError("an open vault is not serialisable")


class Vault:
    """An unlocked vault. Open with `Vault.open`, create with `Vault.init`; close when done.

    `member` and `role` are fixed when the vault is opened (the role is bound to the
    member's key slot); decisions read the vault's own clock."""

    def __init__(self, path: Path, conn: Connection, unlocked: Opened, member: str,
                 lock_fd: int, clock: Clock | None = None) -> None:
        if unlocked.door is None:
            raise UsageError("this member's slot opens no vault keys")
        door = unlocked.door
        self._shared = _Shared(path, clock or SYSTEM_CLOCK, conn, door, lock_fd, door.signer())
        self._member = member
        self._role = unlocked.role
        self._base: Vault | None = None  # the service's vault, on member views (`authenticate`)
        self._shared.audit = audit.AuditLog(conn, self.vault_id, signer=self._signing,
                                            stamp=self._stamp)
        # rows this open found written without the key, now flagged (None: none found)
        self.audit_flagged: dict[str, Any] | None = None
        self._set_policy(registry.load_policy(conn, self._pinned_policy_version()))
        self._door.attach(lambda: self._engine, self._audit_batch)
        self._floor = _newest_entry_time(conn)

    # the shared state, by the names the methods use
    @property
    def path(self) -> Path:
        return self._shared.path

    @property
    def vault_id(self) -> str:
        return self._shared.door.vault_id

    @property
    def _clock(self) -> Clock:
        return self._shared.clock

    @_clock.setter
    def _clock(self, clock: Clock) -> None:
        self._shared.clock = clock

    @property
    def _conn(self) -> Connection:
        return self._shared.conn

    @property
    def _door(self) -> access.Door:
        return self._shared.door

    @property
    def _lock_fd(self) -> int:
        return self._shared.lock_fd

    @property
    def _signing(self) -> crypto.SigningKey:
        return self._shared.signing

    @property
    def _audit(self) -> audit.AuditLog:
        assert self._shared.audit is not None
        return self._shared.audit

    @property
    def _engine(self) -> PolicyEngine:
        assert self._shared.engine is not None
        return self._shared.engine

    @property
    def _policy(self) -> PolicySet:
        assert self._shared.policy is not None
        return self._shared.policy

    def _pinned_policy_version(self) -> str:
        """The pinned policy version, checked against its keyed tag (set by init and
        `apply_policy`; a vault from before the tag gets one now, on trust, audited at recovery)."""
        version = storage.get_meta(self._conn, "policy_version")
        pin = storage.find_meta(self._conn, "policy_pin")
        expected = self._door.policy_pin(version)
        if pin is None:
            self._pin_added = True
            return version
        self._pin_added = False
        if not crypto.constant_time_equal(pin.encode(), expected.encode()):
            raise IntegrityError("the pinned policy set was changed without the vault's keys; "
                                 "restore the database from a backup and tell your DPO")
        return version

    @property
    def member(self) -> str:
        return self._member

    @property
    def role(self) -> str:
        return self._role

    def _stamp(self) -> str:
        return iso_utc(self.now())

    def now(self) -> datetime:
        """The vault's clock (the system's, or the one a test injected at open): decisions,
        deadlines and audit entries all read it; no caller chooses the time of an action.

        For members other than stewards it never reads earlier than the newest audit entry
        (less a small allowance for clock adjustment): a clock set back cannot reopen an
        expired consent."""
        value = moment(self._clock)
        if self._role != "steward":
            if value < self._floor - CLOCK_ALLOWANCE:
                raise Conflict("this computer's clock reads earlier than the vault's newest audit "
                               "entry; correct the clock")
            self._floor = max(self._floor, value)
        return value

    @property
    def policy(self) -> PolicySet:
        """The pinned policy set (change it with `apply_policy`)."""
        return self._policy

    def _set_policy(self, policy: PolicySet) -> None:
        """Pin `policy` for this vault and every member view of it (they share the engine)."""
        self._shared.policy = policy
        self._shared.engine = PolicyEngine(
            policy, lambda pids: registry.latest_consents(self._conn, pids), self._audit_batch,
            self.now, self._door.pseudonyms)

    def _context(self) -> Context:
        """What one use case is given (never the Vault itself)."""
        return Context(conn=self._conn, door=self._door, audit=self._audit, engine=self._engine,
                       member=self._member, role=self._role, policy=self._policy,
                       vault_id=self.vault_id, path=self.path, signer=self._signing,
                       clock=self.now)

    def _audit_batch(self, entries: list[dict[str, Any]]) -> None:
        """Append entries in their own transaction, stamped by the vault's clock."""
        with storage.transaction(self._conn):
            self._audit.append_many(entries, self._stamp())

    # -- lifecycle ------------------------------------------------------------------------------

    @classmethod
    def init(cls, path: Path, passphrase: str, *, member: str = "steward",
             policy_dir: Path | None = None, clock: Clock | None = None) -> Vault:
        """Create a new vault at `path` (atomically: all of it or nothing).

        The policy set (the shipped default, or `policy_dir`) is validated and pinned
        in the vault; later changes go through `apply_policy`.
        """
        check_passphrase(passphrase)
        check_member_name(member)
        policy = load_policy_dir(Path(policy_dir)) if policy_dir else load_default_policy()
        path = Path(path)
        if path.exists() and any(path.iterdir()):
            raise Conflict(f"{path} exists and is not empty; refusing to create a vault there")
        at = iso_utc(moment(clock))
        staging = path.parent / f".{path.name}.creating-{crypto.random_id(6)}"
        staging.mkdir(mode=0o700, parents=True)
        try:
            cls._create(staging, passphrase, member, at, policy)
            if path.exists():
                path.rmdir()
            os.replace(staging, path)
        except BaseException:
            shutil.rmtree(staging, ignore_errors=True)
            raise
        return cls.open(path, passphrase, member=member, clock=clock)

    @staticmethod
    def _create(root: Path, passphrase: str, member: str, at: str, policy: PolicySet) -> None:
        conn = storage.connect(root)
        try:
            storage.create_schema(conn)
            with storage.transaction(conn):
                vault_id, signing = access.new_vault_keys(root, conn, member, passphrase, at,
                                                          policy.version)
                for key, value in {
                    "schema_version": str(storage.SCHEMA_VERSION), "created_at": at,
                    "policy_version": policy.version,
                }.items():
                    storage.set_meta(conn, key, value)
                registry.store_policy(conn, policy, at)
                log = audit.AuditLog(conn, vault_id, signer=signing)
                log.append({"actor": member, "action": "vault.init", "decision": "done",
                            "details": {"fingerprint": crypto.fingerprint(signing.public_key),
                                        "policy_version": policy.version,
                                        "member": member, "role": "steward"}}, at)
                log.sign_head(signing, at)
        finally:
            conn.close()

    @classmethod
    def open(cls, path: Path, passphrase: str, *, member: str = "steward",
             clock: Clock | None = None) -> Vault:
        """Unlock a vault for `member`; cleans up after any interrupted write.

        Members whose role reads no participant data (auditors) hold no key that opens
        the vault: for them this raises PolicyRefusal (recorded as their note); they use
        `read_audit_log` and the key-free checks instead."""
        path = Path(path)
        _require_vault(path)
        lock_fd = _take_lock(path)
        conn: Connection | None = None
        try:
            conn = storage.connect(path)
            vault_id = _check_schema(conn)
            storage.add_missing_tables(conn)
            storage.add_missing_columns(conn)
            policy = registry.load_policy(conn, storage.get_meta(conn, "policy_version"))
            unlocked = access.unlock(conn, path, vault_id, member, passphrase, reads_data(policy))
            if unlocked.door is None:
                notes.add(conn, vault_id, member, unlocked, "vault.open", "refuse",
                          iso_utc(moment(clock)))
                raise PolicyRefusal(
                    f"member '{member}' ({unlocked.role}) holds no key to participant data",
                    hint="key-free-checks")
            vault = cls(path, conn, unlocked, member, lock_fd, clock)
            vault._check_audit()
            consent.check_consent_heads(vault._context())
        except BaseException:
            if conn is not None:
                conn.close()
            os.close(lock_fd)
            raise
        vault._recover(upgraded=unlocked.upgraded)
        return vault

    def _check_audit(self) -> None:
        """Never sign over rows written without the key: flag them first, for good, so the
        vault keeps working (a withdrawal cannot wait) and `audit verify` keeps failing."""
        with storage.transaction(self._conn):
            self.audit_flagged = self._audit.flag_unsigned(self._stamp())

    def _recover(self, *, upgraded: bool = False) -> None:
        from vault.services.ingest import scrub_clear_metadata
        from vault.services.withdraw import _finish_interrupted

        context = self._context()
        scrub_clear_metadata(context)  # recording metadata earlier versions kept in clear
        self._door.recover_files(participants.blob_ids(self._conn))
        _finish_interrupted(context)  # an erasure killed between its commit and its clean-up
        from vault.services.export_runs import recover

        recover(context)  # an export killed before it was in place: finished, refunded or voided
        entries = notes.fold(self._conn, self.vault_id, self._door.member_key)
        if upgraded:
            entries.append({"actor": self.member, "action": "member.slot-bound", "decision": "done",
                            "details": {"member": self.member, "role": self.role}})
        if self._pin_added:
            entries.append({"actor": self.member, "action": "policy.pinned", "decision": "done",
                            "details": {"version": self.policy.version}})
        if entries:
            with storage.transaction(self._conn):
                self._audit.append_many(entries, self._stamp())
                notes.clear(self._conn)
                if self._pin_added:
                    storage.set_meta(self._conn, "policy_pin", self._door.policy_pin(self.policy.version))
                    self._pin_added = False

    def close(self) -> None:
        """Sign a tree head over any new entries, then release the vault (a member view
        from `authenticate` leaves that to its service)."""
        if self._shared.closed or self._base is not None:
            return
        self._shared.gate.flush_all(self._context())
        try:
            head = self._audit.latest_head()
            if head is None or head.tree_size < self._audit.size:
                try:
                    at = self._stamp()
                except Conflict:  # a clock set back mid-session: the session's last good time
                    at = iso_utc(self._floor)
                with storage.transaction(self._conn):
                    self._audit.sign_head(self._signing, at)
        finally:
            self._shared.closed = True
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

    def rekey(self, new_passphrase: str) -> dict[str, Any]:
        """New master key and new passphrase for this member; re-wraps keys, never data."""
        return rekeying.rekey(self._context(), new_passphrase)

    # -- participants and blobs -----------------------------------------------------------------

    def _refuse_role(self, action: str) -> None:
        self._context().refuse_role(action)

    def new_participant(self) -> str:
        """Create a participant with a fresh data key; returns their random id."""
        return blobs.new_participant(self._context())

    def put_blob(self, pid: str, kind: str, chunks: Iterable[bytes], *,
                 details: dict[str, Any] | None = None) -> BlobInfo:
        """Encrypt and store a blob for `pid`: file first, then row and audit entry at once."""
        return blobs.put_blob(self._context(), pid, kind, chunks, details=details)

    # -- policy, enrolment and consent -----------------------------------------------------------

    def apply_policy(self, policy_dir: Path) -> dict[str, Any]:
        """Pin a new policy set (validated first); consent already given is not changed."""
        policy, applied = policy_apply.apply_policy(self._context(), Path(policy_dir))
        self._set_policy(policy)
        return applied

    def enrol(self, form: bytes) -> dict[str, Any]:
        """Enrol a participant from a filled consent form (TOML bytes).

        Identity and contact details are stored only encrypted under the new
        participant's own key; the consent terms become version 1 under a random id.
        """
        return consent.enrol(self._context(), form)

    def amend_consent(self, pid: str, form: bytes) -> dict[str, Any]:
        """Add a consent version from a new filled form (a partial withdrawal is one)."""
        return consent.amend_consent(self._context(), pid, form)

    def consent_history(self, pid: str) -> list[dict[str, Any]]:
        """The consent versions, oldest first (kept after erasure: they name no one)."""
        return consent.consent_history(self._context(), pid)

    # -- the one door -----------------------------------------------------------------------------

    def request(self, purpose: str, categories: Iterable[str], *,
                participants: Iterable[str] | None = None) -> Request:
        """A plain read request by this member: cohort rules apply, no export options. Only
        stewards may name participants (others would learn which vault ids exist)."""
        if participants is not None and self.role != "steward":
            self._refuse_role("access.participants")
        return Request(actor=self.member, role=self.role, purpose=purpose,
                       categories=frozenset(categories),
                       participants=None if participants is None else tuple(participants))

    def access_check(self, purpose: str, categories: Iterable[str], *,
                     participants: Iterable[str] | None = None) -> CohortDecision:
        """Who a request would include and why others are not; reads no data (audited).

        Stewards see vault ids; everyone else sees the purpose's pseudonyms."""
        decision = self._engine.decide(self.request(purpose, categories, participants=participants))
        if self.role == "steward":
            return decision
        names = self._door.pseudonyms(purpose, list(decision.decisions))
        return replace(decision, request=decision.request.model_copy(update={"participants": None}),
                       decisions=MappingProxyType({names[p]: d for p, d in decision.decisions.items()}),
                       eligible=tuple(names[p] for p in decision.eligible))

    def authorize(self, purpose: str, categories: Iterable[str], *,
                  participants: Iterable[str] | None = None) -> Grant:
        """A grant from the policy engine, or PolicyRefusal (both audited).

        A grant for a purpose that requires differential-privacy noise yields plaintext to
        no caller: only the release mechanisms (`export_matrix`) read under it."""
        return self._engine.authorize(self.request(purpose, categories, participants=participants))

    def read_blob(self, grant: Grant, blob_id: str) -> Iterator[bytes]:
        """Plaintext of one blob through the one door (grant checked live, read audited)."""
        ((_, _, chunks),) = list(self.read_blobs(grant, [blob_id]))
        return chunks

    def read_blobs(self, grant: Grant, blob_ids: list[str]) -> Iterator[tuple[str, str, Iterator[bytes]]]:
        """Many blobs through the one door: one live decision, one audit batch.

        Yields (blob_id, subject, plaintext chunks) in the order given. The subject is the
        participant's pseudonym for the grant's purpose (stewards: their random vault id).
        Refused for purposes that require differential-privacy noise."""
        reads = self._door.read(grant, blob_ids, for_noise=False)
        names = ({pid: pid for _, pid, _ in reads} if self.role == "steward"
                 else self._door.pseudonyms(grant.purpose, sorted({pid for _, pid, _ in reads})))
        return ((blob_id, names[pid], chunks) for blob_id, pid, chunks in reads)

    # -- ingest -------------------------------------------------------------------------------------

    def ingest_eeg(self, pid: str, path: Path, *, sidecar: Path | None = None,
                   event_codes: str | list[str] | None = None, keep_sex: bool = False,
                   age_band_years: int | None = None, keep_header_identity: bool = False
                   ) -> dict[str, Any]:
        """De-identify and store an EDF/EDF+/BDF (or .npy/.npz + sidecar) recording, streamed.

        `event_codes`: the annotations to keep (vault.policy.event_codes; a list or one comma-separated
        string), default the policy set's. Ingesting the same content again stores nothing and
        returns the stored blob with `already_stored`.
        """
        from vault.services.ingest import ingest_eeg

        return ingest_eeg(self._context(), pid, Path(path), sidecar=sidecar, event_codes=event_codes,
                          keep_sex=keep_sex, age_band_years=age_band_years,
                          keep_header_identity=keep_header_identity)

    def ingest_eeg_stream(self, pid: str, stream: SupportsRead, size: int, *,
                          name: str = "upload.edf", event_codes: str | list[str] | None = None,
                          keep_sex: bool = False, age_band_years: int | None = None,
                          keep_header_identity: bool = False) -> dict[str, Any]:
        """`ingest_eeg` for an EDF/EDF+/BDF upload: `stream.read(n)` sequentially (no seek),
        `size` the byte count announced for it. The header is checked against `size` first;
        the records are de-identified and encrypted a block at a time (never the whole
        recording in memory). A stream that ends early, sends more or fails is refused with
        nothing stored. Same result document as `ingest_eeg`."""
        from vault.services.ingest import ingest_eeg_stream

        return ingest_eeg_stream(self._context(), pid, stream, size, name=name,
                                 event_codes=event_codes, keep_sex=keep_sex,
                                 age_band_years=age_band_years,
                                 keep_header_identity=keep_header_identity)

    def ingest_scores(self, path: Path, kind: str) -> dict[str, Any]:
        """Store a CSV of derived scores or explicit ratings: all rows or none."""
        from vault.services.ingest import ingest_scores

        return ingest_scores(self._context(), Path(path), kind)

    def ingest_scores_bytes(self, data: bytes, kind: str, *, name: str = "upload.csv") -> dict[str, Any]:
        """`ingest_scores` for a CSV that arrives as bytes (an upload, at most 256 MiB); `name`,
        the upload's file name, must end in .csv if it has a suffix. Nothing is written to disk
        but the encrypted batches."""
        from vault.services.ingest import ingest_scores_bytes

        return ingest_scores_bytes(self._context(), data, kind, name=name)

    # -- exports ------------------------------------------------------------------------------------

    def export_eeg(self, purpose: str, out: Path, *, recipient: str | None = None,
                   with_demographics: bool = False) -> dict[str, Any]:
        """Granted, de-identified recordings as an EEG-BIDS dataset with a signed manifest.

        Sex and age band stay in the headers and participants.tsv only with
        `with_demographics`, which also asks the grant for the demographics category.
        """
        from vault.services.export_eeg import export_eeg

        return export_eeg(self._context(), purpose=purpose, out=Path(out), recipient=recipient,
                          with_demographics=with_demographics)

    def export_matrix(self, purpose: str, category: str, out: Path,
                      **options: Any) -> dict[str, Any]:
        """A pseudonymised, differentially private preference release (matrix or aggregate)."""
        from vault.services.export_matrix import export_matrix

        return export_matrix(self._context(), purpose=purpose, category=category, out=Path(out),
                             **options)

    def export_utility(self, purpose: str, category: str, epsilons: list[float], out_png: Path,
                       **options: Any) -> dict[str, Any]:
        """Held-out RMSE of a recommender trained on noised data per epsilon; only RMSEs leave.

        Stewards only: the no-noise baseline is computed on the real data and the figures
        are not differentially private."""
        from vault.services.export_matrix import export_utility

        return export_utility(self._context(), purpose=purpose, category=category, epsilons=epsilons,
                              out_png=Path(out_png), **options)

    def budget(self, purpose: str | None = None, *, show_participants: bool | None = None
               ) -> list[dict[str, Any]]:
        """Privacy budget spent per purpose (per participant for stewards)."""
        from vault.services.budget import budget_report

        show = self.role == "steward" if show_participants is None else show_participants
        return budget_report(self._context(), purpose, show_participants=show)

    def check_export(self, document: dict[str, Any]) -> dict[str, Any]:
        """Whether an export someone holds now contains withdrawn or expired participants."""
        from vault.services.exports import check_export

        return check_export(self._context(), document)

    # -- withdrawal and erasure ---------------------------------------------------------------------

    def withdraw_request(self, pid: str, *, received: date, scope: str = "full") -> dict[str, Any]:
        """Record a withdrawal request with its deadline (GDPR Art. 12(3); policy set)."""
        from vault.services.withdraw import request_withdrawal

        return request_withdrawal(self._context(), pid, received=received, scope=scope)

    def withdraw_pending(self) -> list[dict[str, Any]]:
        from vault.services.withdraw import pending

        return pending(self._context())

    def withdraw_process(self, target: str) -> dict[str, Any]:
        """Erase (full) or narrow (purpose) as requested; returns the signed receipt and recall list."""
        from vault.services.withdraw import process

        return process(self._context(), target)

    def withdraw_receipt(self, target: str) -> dict[str, Any]:
        from vault.services.withdraw import receipt_of

        return receipt_of(self._context(), target)

    def sweep(self, *, dry_run: bool = False) -> dict[str, Any]:
        """Erase, with receipts, everyone whose consent expired or retention ended."""
        from vault.services.withdraw import sweep

        return sweep(self._context(), dry_run=dry_run)

    def report(self) -> dict[str, Any]:
        """A record of processing (GDPR Art. 30 style): definitions and counts only."""
        from vault.services.report import record_of_processing

        return record_of_processing(self._context())

    # -- members ------------------------------------------------------------------------------------

    def add_member(self, name: str, role: str, passphrase: str | None = None, *,
                   expires_days: int = tokens.DEFAULT_DAYS) -> dict[str, Any]:
        """A new member: with a passphrase (it wraps the same master key) on a local vault; on a
        served vault a token-only member (the token is in the result, shown once), or a steward
        with a passphrase who can unlock the service."""
        return members.add_member(self._context(), name, role, passphrase,
                                  expires_days=expires_days)

    def remove_member(self, name: str) -> dict[str, str]:
        """Remove a member's key slot and tokens; nobody else is rekeyed."""
        return members.remove_member(self._context(), name)

    def members(self) -> list[dict[str, Any]]:
        return members.members(self._context())

    # -- serving ------------------------------------------------------------------------------------

    @property
    def served(self) -> bool:
        """Whether the vault was converted for `mindward serve` (members hold tokens, not keys)."""
        return tokens.served(self._context())

    def make_served(self, passphrase: str) -> dict[str, Any]:
        """Convert the vault for the service: a fresh master key under this steward's
        `passphrase`; every other key slot removed (stewards only; audited)."""
        return rekeying.make_served(self._context(), passphrase)

    def issue_token(self, member: str, *, expires_days: int = tokens.DEFAULT_DAYS) -> dict[str, Any]:
        """A new token for a member of a served vault; the token text is shown only here."""
        return tokens.issue_token(self._context(), member, expires_days)

    def revoke_tokens(self, member: str) -> dict[str, Any]:
        """Revoke every token of `member` (they stay a member, with no way in)."""
        return tokens.revoke_tokens(self._context(), member)

    def authenticate(self, token: object, *, client: str, operation: str) -> Vault:
        """The vault as the token's member sees it (same door, engine and connection; their
        name and role), or AuthenticationFailed, one opaque message for every reason, or
        Throttled after too many failures from `client`. Each use and failure is audited.
        Call it, and use the view, on the thread that opened the vault."""
        if self._base is not None:
            return self._base.authenticate(token, client=client, operation=operation)
        member, role = tokens.authenticate(self._context(), token, client=client,
                                           operation=operation, gate=self._shared.gate)
        return _MemberView(self._shared, member, role, self)

    def access_summary(self, purpose: str, categories: Iterable[str]) -> dict[str, Any]:
        """`access_check` as a document: counts always, per-participant reasons to stewards only
        (what `mindward access check --json` prints, locally and through the service)."""
        return self.access_check(purpose, categories).summary(show_ids=self.role == "steward")

    def export_members(self, export_id: str) -> set[str]:
        """The vault ids an export holds (its lineage; stewards only)."""
        return members.export_members(self._context(), export_id)

    def readable(self, pid: str) -> bool:
        """Whether a participant's data key still opens (False once erased; stewards only)."""
        return blobs.readable(self._context(), pid)

    # -- blobs --------------------------------------------------------------------------------------

    def blobs(self, pid: str | None = None) -> list[dict[str, Any]]:
        return blobs.blobs(self._context(), pid)

    # -- verification and the audit log ---------------------------------------------------------

    def verify(self, *, trusted: list[audit.TreeHead] | None = None) -> dict[str, Any]:
        """Check the audit log and authenticate every stored blob (no plaintext leaves)."""
        return auditing.verify(self._context(), trusted)

    def audit_entries(self, start: int = 0, limit: int | None = None) -> list[dict[str, Any]]:
        """Entries of the log, for roles the policy set lets read it (audited)."""
        return auditing.audit_entries(self._context(), start, limit)

    def sign_head(self) -> audit.TreeHead:
        return auditing.sign_head(self._context())


class _MemberView(Vault):
    """`Vault.authenticate`'s result: the service's open vault as one token member sees it.
    It shares the service's state; its own are the member, role and clock floor."""

    def __init__(self, shared: _Shared, member: str, role: str, base: Vault) -> None:
        self._shared = shared
        self._member = member
        self._role = role
        self._base = base
        self.audit_flagged = None
        self._floor = _newest_entry_time(shared.conn)


def _check_schema(conn: Connection) -> str:
    try:
        version = int(storage.get_meta(conn, "schema_version"))
        vault_id = storage.get_meta(conn, "vault_id")
    except DatabaseError as exc:
        raise IntegrityError("the vault database is unreadable or not a vault") from exc
    if version != storage.SCHEMA_VERSION:
        raise IntegrityError(f"vault schema {version} is not supported by this version")
    return vault_id


def _readonly(path: Path) -> Connection:
    _require_vault(Path(path))
    try:
        conn = storage.connect(Path(path), readonly=True)
        _check_schema(conn)
    except DatabaseError as exc:
        raise IntegrityError("the vault database is unreadable or not a vault") from exc
    return conn


def describe(path: Path) -> dict[str, Any]:
    """Public facts about a vault; needs no passphrase."""
    conn = _readonly(path)
    try:
        public = bytes.fromhex(storage.get_meta(conn, "signing_public_key"))
        head = audit_rows.latest_tree_head(conn)
        return {
            "path": str(path), "vault_id": storage.get_meta(conn, "vault_id"),
            "created_at": storage.get_meta(conn, "created_at"),
            "schema_version": storage.SCHEMA_VERSION,
            "public_key": public.hex(), "fingerprint": crypto.fingerprint(public),
            "participants": participants.count(conn),
            "participants_erased": participants.count(conn, erased=True),
            "blobs": counts.rows(conn, "blobs"),
            "audit_entries": counts.rows(conn, "audit_log"),
            "latest_tree_head": None if head is None else audit.TreeHead.from_row(*head).to_dict(),
            "served": storage.find_meta(conn, "served_at") is not None,
            "key_slots": [{"member": m, "role": r} for m, r in slots.holders(conn)],
            "token_members": token_rows.member_count(conn),
        }
    finally:
        conn.close()


def read_audit_log(path: Path, passphrase: str, *, member: str, start: int = 0,
                   limit: int | None = None, clock: Clock | None = None) -> list[dict[str, Any]]:
    """The log's entries for a member whose role may read it (auditors included: this
    needs their passphrase, never a key to participant data). Each read, and each refusal,
    is left as the member's authenticated note and folded into the log by the next
    session that holds the vault's keys."""
    path = Path(path)
    _require_vault(path)
    lock_fd = _take_lock(path)
    try:
        conn = storage.connect(path)
        try:
            vault_id = _check_schema(conn)
            storage.add_missing_tables(conn)
            policy = registry.load_policy(conn, storage.get_meta(conn, "policy_version"))
            unlocked = access.unlock(conn, path, vault_id, member, passphrase, reads_data(policy))
            at = iso_utc(moment(clock))
            role = policy.roles.get(unlocked.role)
            allowed = role is not None and role.reads_audit
            entries = audit.AuditLog(conn, vault_id).entries(start, limit) if allowed else []
            with storage.transaction(conn):
                notes.add(conn, vault_id, member, unlocked, "audit.show",
                          "done" if allowed else "refuse", at, start=start, entries=len(entries))
            if not allowed:
                raise PolicyRefusal(f"member '{member}' ({unlocked.role}) may not read the audit log")
            return entries
        finally:
            conn.close()
    finally:
        os.close(lock_fd)


def parse_public_key(text: str) -> bytes:
    try:
        key = bytes.fromhex(text.strip())
    except ValueError:
        key = b""
    if len(key) != 32:
        raise UsageError("a public key is 64 hex digits", hint="public-key", param="public_key")
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
                                "pass the public key you hold to rule out a swapped key")
        return report
    finally:
        conn.close()


def read_tree_head(text: str) -> audit.TreeHead:
    try:
        return audit.TreeHead.from_dict(strictjson.loads(text))
    except (ValueError, TypeError) as exc:
        raise IntegrityError("the tree head file is not valid strict JSON") from exc


def prove(path: Path, seq: int) -> dict[str, Any]:
    """Inclusion proof of entry `seq` under the latest signed tree head; no passphrase."""
    conn = _readonly(path)
    try:
        return audit.AuditLog(conn, storage.get_meta(conn, "vault_id")).inclusion_bundle(seq)
    finally:
        conn.close()


def check_consistency(path: Path, earlier: audit.TreeHead, public_key: bytes) -> dict[str, Any]:
    """Does the vault's log, under its latest signed head, extend an earlier head you kept?

    Builds an RFC 9162 consistency proof from the vault and checks it with the public key;
    no passphrase.
    """
    conn = _readonly(path)
    try:
        try:
            bundle = audit.AuditLog(conn, storage.get_meta(conn, "vault_id")).consistency_bundle(
                earlier.tree_size)
        except NotFound:
            return {"ok": False, "problem": "the log is shorter than the earlier head: entries "
                                            "were removed", "bundle": None}
    finally:
        conn.close()
    ok = audit.verify_consistency_bundle(bundle, earlier, public_key)
    return {"ok": ok, "problem": None if ok else "the log does not extend the earlier head",
            "bundle": bundle}


def verify_proof(bundle: dict[str, Any], public_key: bytes) -> bool:
    """Offline check of a proof from `prove`, with the vault's public key alone."""
    return audit.verify_inclusion_bundle(bundle, public_key)


def verify_export(out: Path, public_key: bytes) -> dict[str, Any]:
    """Check an export folder's manifest signature and file digests; no passphrase."""
    from vault.services.export_matrix import verify_export_dir

    return verify_export_dir(Path(out), public_key)


def verify_receipt_file(path: Path, public_key: bytes) -> tuple[bool, list[str]]:
    """Check a deletion receipt offline with the vault's public key alone."""
    from vault.audit.receipt import verify_text

    try:
        text = Path(path).read_bytes()
    except OSError as exc:
        raise NotFound(f"cannot read {path}") from exc
    return verify_text(text, public_key)


def read_items(path: Path) -> list[str]:
    from vault.services.export_matrix import read_items as read

    return read(Path(path))
