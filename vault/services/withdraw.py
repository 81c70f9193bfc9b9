"""Withdrawal and erasure with a signed deletion receipt, retention sweeps, and recall.

Called through the `Vault` facade with a use case's `Context` first (like vault.services.ingest).

Requests. `request_withdrawal` records who asked, when it was received and the
scope (`full`, or `purpose:P`); the deadline is `received` plus the policy's
`withdrawal_deadline_days` (30 by default: GDPR Art. 12(3), one month). `pending`
lists open requests, overdue first. `process` carries one out and returns its
receipt (vault.audit.receipt) and the earlier exports, with their recipients, that
included the participant (lineage: GDPR Art. 19, notify recipients).

Full withdrawal = cryptographic erase (NIST SP 800-88). The participant's data
key exists on disk only wrapped in `participants.wrapped_key`; the door's `shred`
sets it NULL, which makes every blob of theirs, their date shift and their keyed
tags unreadable even with every passphrase. Their blob, recording and score rows, privacy
ledger rows, identity record and lab-code tag are deleted too. What stays: the
participant row (random id, key commitment, erased_at) so the audit log's ids
still resolve, the append-only consent history (a `withdrawn` version is
appended), the audit log (random ids only) and the export lineage (to notify
recipients). A purpose-only withdrawal appends a version withdrawing that
purpose (and its narrower children) and deletes only the categories that
purpose granted and that no purpose still permitting processing grants; the
receipt says what was kept and why.

Crash atomicity. Phase 1 is ONE SQLite transaction (WAL, synchronous=FULL):
the key NULL, the rows deleted, the consent version, the audit entry, a tree
head signed over it, the receipt (signed after its inclusion proof under that
head was computed) and the request marked processed. A SIGKILL before COMMIT is
durable leaves the state before (the uncommitted WAL frames are ignored, the
blob files are untouched); after it, the state after. So there is never a
receipt for a half-erased participant, nor an erased one without a receipt.
Phase 2, after COMMIT, is idempotent cleanup: the blob files are moved out of
blobs/ into tmp/ (a rename each, constant time; orphans without a row are
ciphertext under a destroyed key, and `BlobStore.recover` removes orphans and
empties tmp/ at every open), an incremental vacuum (free pages back to the file
system) and a WAL checkpoint(TRUNCATE). With `secure_delete` on, freed cells and
pages are zeroed; the checkpoint overwrites the old page images in the main file
and empties the WAL, so no key material or plaintext remains in the DB file, WAL
or free pages. (Blocks the file system freed when the WAL was truncated are not
overwritten: docs/erasure.md says what that means.) A kill inside phase 2 is
completed by the next open (orphan and tmp/ removal; SQLite checkpoints when
the last connection closes; `_finish_interrupted`) or by rerunning `process`,
which reports the request as done (Conflict) after finishing phase 2. Last, `reclaim` unlinks the moved
files. Unlinking is proportional to the size on common file systems (ext4 here:
about 0.2 s per GiB, even with a cold cache), so it is kept apart from the
erasure proper, which is constant in the data size (mindward_bench.withdraw).

A purpose-only withdrawal cannot destroy the key (other data stays readable),
so its deleted files are overwritten with zeros before unlinking: best effort
only (journaling, copy-on-write file systems and SSD wear levelling may keep
old blocks; docs/erasure.md).

Retention. `sweep` erases, with receipts, every living participant whose
latest consent has ended (its `expires` or `retention_end` passed): one
transaction each, so a kill mid-sweep leaves finished participants finished
and a rerun continues; erased participants are skipped (idempotent). Two
sweeps never run at once: a vault is opened by one process at a time (flock).
"""

from __future__ import annotations

import datetime as dt
import os
import re
from collections.abc import Iterable
from pathlib import Path
from typing import TYPE_CHECKING, Any

from vault import crypto
from vault.audit import receipt
from vault.errors import Conflict, InvalidInput, NotFound, UsageError
from vault.policy.consent import ConsentStatus, ConsentVersion, answering_purpose, revise_status
from vault.services import exports
from vault.storage import db as storage
from vault.storage import lineage, registry
from vault.storage import withdrawals as requests
from vault.storage.files import fsync_path
from vault.times import iso_utc

if TYPE_CHECKING:
    from vault.policy.policyset import PolicySet
    from vault.services.context import Context

SCOPE_FULL = "full"
PURPOSE_PREFIX = "purpose:"
PENDING, PROCESSED, SUPERSEDED = "pending", "processed", "superseded"
TRIGGER_REQUEST = "participant-request"
TRIGGER_EXPIRED = "consent-expired"
TRIGGER_RETENTION = "retention-ended"
STAGES = ("nothing-stored", "stored", "derived", "exported", "shared")
_PURPOSE_ID = re.compile(r"[a-z0-9][a-z0-9-]{0,39}(/[a-z0-9][a-z0-9-]{0,39})*")
_IDENTITY = "identity-contact"
_CHUNK = 500
_ZEROS = bytes(1 << 20)
_UNFLUSHED_NOTE = "erasure_unflushed"  # meta key: an erasure's checkpoint could not finish
TRASH_SUFFIX = ".erased.part"  # in tmp/: BlobStore.recover removes "*.part" at every open

BACKUP_NOTE = (
    "Backups and copies of the vault directory made before this erasure still hold the "
    "participant's wrapped data key and ciphertext; the lab must let them expire or destroy them "
    "on its backup schedule, and must not restore this participant from them.")
EXPORT_NOTE = (
    "Exports made earlier (listed) are outside the vault: the lab must tell each recipient "
    "(GDPR Art. 19) and have the copy deleted or replaced (an export check tells which).")
CAUTIONS = (
    "This receipt records what the vault destroyed; it does not cover paper forms, e-mails, "
    "analysis results or other copies outside the vault.",
    "Whether this erasure meets your obligations is for your data-protection officer, ethics "
    "board and local law to judge.",
)


def _today(now: dt.datetime) -> dt.date:
    return now.astimezone(dt.UTC).date()


def parse_scope(text: str) -> str:
    """'full' or 'purpose:<purpose id>' (the purpose is checked against the consent later)."""
    if text == SCOPE_FULL:
        return text
    if text.startswith(PURPOSE_PREFIX) and _PURPOSE_ID.fullmatch(text[len(PURPOSE_PREFIX):]):
        return text
    raise UsageError("the scope is 'full' or 'purpose:PURPOSE_ID'", param="scope")


def _purpose(scope: str) -> str:
    return scope[len(PURPOSE_PREFIX):]


# --------------------------------------------------------------------------- requests


def _erasure_note(ctx: Context, pid: str) -> str:
    row = requests.last_full_erasure(ctx.conn, pid, PROCESSED, SCOPE_FULL)
    how = f"by request {row[0]} at {row[1]}" if row else "earlier"
    return f"participant '{pid}' was erased {how}; there is nothing left to withdraw"


def _require_living(ctx: Context, pid: str) -> None:
    erased = requests.erased(ctx.conn, pid)
    if erased is None:
        raise NotFound(f"no participant '{pid}'")
    if erased:
        raise Conflict(_erasure_note(ctx, pid))


def _family(policy: PolicySet, purpose: str) -> set[str]:
    """`purpose` and every narrower purpose of the policy (consent for it covers them)."""
    return {purpose} | {q for q in policy.purposes if purpose in policy.chain(q)}


def _named_purposes(policy: PolicySet, consent: ConsentVersion, purpose: str) -> list[str]:
    """The answered purposes a withdrawal of `purpose` ends: it and its narrower children."""
    family = _family(policy, purpose)
    named = sorted(p for p in consent.purposes if p in family)
    if named:
        return named
    broader = answering_purpose(consent, policy.chain(purpose)[1:] if purpose in policy.purposes else ())
    if broader is not None:
        raise InvalidInput(f"the consent answers {purpose} only through {broader}; "
                           f"withdraw purpose:{broader}, or amend the consent with a signed form",
                           param="scope")
    raise InvalidInput(f"the consent does not answer purpose {purpose}", param="scope")


def _earliest_request(ctx: Context, pid: str, history: list[ConsentVersion]) -> dt.date:
    """The first day a withdrawal can have been received: the first consent's signature."""
    if history:
        return min(version.signed for version in history)
    return dt.datetime.fromisoformat(requests.created_at(ctx.conn, pid)).astimezone(dt.UTC).date()


def request_withdrawal(ctx: Context, pid: str, *, received: dt.date,
                       scope: str = SCOPE_FULL) -> dict[str, Any]:
    """Record a withdrawal request and its deadline; audited. Nothing is deleted yet."""
    now = ctx.now()
    ctx.require_steward("withdraw.request")
    scope = parse_scope(scope)
    if not isinstance(received, dt.date) or isinstance(received, dt.datetime):
        raise UsageError("the date received is a date (YYYY-MM-DD)", param="received")
    if received > (now.astimezone(dt.UTC) + dt.timedelta(hours=14)).date():
        raise UsageError("the date received lies in the future", param="received")
    _require_living(ctx, pid)
    history = registry.consent_history(ctx.conn, pid)
    if received < _earliest_request(ctx, pid, history):
        raise UsageError("the date received lies before the participant's consent was signed "
                         "(or, with no consent on record, before their enrolment): check the date",
                         param="received")
    if scope != SCOPE_FULL:
        if not history:
            raise Conflict(f"participant '{pid}' has no consent on record; request a full withdrawal")
        _named_purposes(ctx.policy, history[-1], _purpose(scope))
    days = ctx.policy.meta.withdrawal_deadline_days
    deadline = received + dt.timedelta(days=days)
    request_id = "w-" + crypto.random_id(8)
    at = iso_utc(now)
    with storage.transaction(ctx.conn):
        existing = requests.open_request(ctx.conn, pid, scope, PENDING)
        if existing:
            raise Conflict(f"this withdrawal is recorded already as request {existing}")
        requests.insert_request(ctx.conn, request_id=request_id, pid=pid, scope=scope,
                                received=received.isoformat(), deadline=deadline.isoformat(),
                                status=PENDING)
        ctx.audit.append({"actor": ctx.member, "action": "withdraw.request", "subjects": [pid],
                         "decision": "done",
                         "details": {"request": request_id, "scope": scope,
                                     "received": received.isoformat(),
                                     "deadline": deadline.isoformat()}}, at)
    return {"request_id": request_id, "participant_id": pid, "scope": scope,
            "received": received.isoformat(), "deadline": deadline.isoformat(),
            "deadline_days": days, "days_left": (deadline - _today(now)).days}


def pending(ctx: Context) -> list[dict[str, Any]]:
    """Open requests, overdue first (then by deadline)."""
    ctx.require_steward("withdraw.pending")
    now = ctx.now()
    rows = requests.requests_in(ctx.conn, PENDING)
    today = _today(now)
    out = []
    for request_id, pid, scope, received, deadline in rows:
        left = (dt.date.fromisoformat(deadline) - today).days
        out.append({"request_id": request_id, "participant_id": pid, "scope": scope,
                    "received": received, "deadline": deadline, "days_left": left,
                    "overdue": left < 0})
    return out


# --------------------------------------------------------------------------- processing


def _resolve(ctx: Context, target: str) -> tuple[str, ...]:
    """The request row (request_id, pid, scope, received, deadline, status) `target` names."""
    if target.startswith("w-"):
        row = requests.request(ctx.conn, target)
        if row is None:
            raise NotFound(f"no withdrawal request '{target}'")
        return tuple(row)
    _require_living(ctx, target)
    rows = requests.requests_of(ctx.conn, target, PENDING)
    if not rows:
        raise NotFound(f"no open withdrawal request for participant '{target}'",
                       hint="withdraw-request")
    full = [r for r in rows if r[2] == SCOPE_FULL]
    if full or len(rows) == 1:
        return tuple((full or rows)[0])
    raise UsageError("several open requests for this participant; name one of "
                     + ", ".join(r[0] for r in rows))


def process(ctx: Context, target: str, *, reclaim_space: bool = True
            ) -> dict[str, Any]:
    """Carry out a request (named by request id, or by participant id when one is open).

    Returns the signed receipt, what was destroyed and kept, and the exports to recall.
    A request already processed is a Conflict (after finishing any interrupted cleanup).
    `reclaim_space=False` leaves the unlinking of the erased files to `reclaim` (or the
    next open): the erasure itself is complete either way.
    """
    now = ctx.now()
    ctx.require_steward("withdraw.process")
    try:
        request_id, pid, scope, received, deadline, status = _resolve(ctx, target)
    except Conflict as exc:
        raise Conflict(exc.message + _flush_note(_finish_interrupted(ctx))) from None
    if status != PENDING:
        done = _finish_interrupted(ctx, _receipt_blobs(ctx, request_id))
        raise Conflict(f"request {request_id} was {status} already; nothing to do" + _flush_note(done),
                       hint="withdraw-receipt" if status == PROCESSED else None)
    keys: list[bytes] = []
    if scope == SCOPE_FULL:
        result, blobs = _erase(ctx, pid, request_id=request_id, received=received,
                               deadline=deadline, trigger=TRIGGER_REQUEST, now=now,
                               destroyed_keys=keys)
    else:
        result, blobs = _withdraw_purpose(ctx, pid, request_id=request_id, received=received,
                                          deadline=deadline, scope=scope, now=now)
    result.update(_finish_interrupted(ctx, blobs, overwrite=scope != SCOPE_FULL,
                                     reclaim_space=reclaim_space, destroyed_keys=keys))
    if not result["flushed"]:
        raise Conflict(f"request {request_id}: {UNFLUSHED}")
    return result


UNFLUSHED = ("erasure recorded (receipt stored) but not yet flushed from the file: another "
             "process holds the database open; close it and run again (the next open of the "
             "vault also finishes it)")


def _flush_note(done: dict[str, Any]) -> str:
    """What a repeated `process` says about an earlier erasure's flush."""
    if done.get("finished_earlier_erasure"):
        return "; an earlier erasure is now flushed from the file"
    if not done["erasure_unflushed"]:
        return ""
    return ("; an earlier erasure is still not flushed from the file: close other programs "
            "holding the database and run again")


def _blob_rows(ctx: Context, pid: str) -> list[tuple[str, str, int]]:
    return requests.blob_rows(ctx.conn, pid)


def _stage(ctx: Context, kinds: set[str], held_in: list[dict[str, str]]) -> dict[str, Any]:
    derived_kinds = {c for c, cat in ctx.policy.categories.items() if cat.derived_from is not None}
    flags = {"stored": bool(kinds), "derived": bool(kinds & derived_kinds),
             "exported": bool(held_in),
             "shared": any(e["recipient"] != "internal" for e in held_in)}
    reached = STAGES[0]
    for stage in STAGES[1:]:
        if flags[stage]:
            reached = stage
    return {"reached": reached, **flags}


def _delete_rows(ctx: Context, pid: str, blob_ids: list[str] | None) -> dict[str, int]:
    """Delete the rows of `blob_ids` (None: every row of the participant); counts per table."""
    return requests.delete_rows(ctx.conn, pid, blob_ids)


def _append_consent(ctx: Context, latest: ConsentVersion, now: dt.datetime, purposes: list[str] | None
                    ) -> tuple[dict[str, Any], ConsentVersion | None]:
    """Append a `withdrawn` version (all purposes, or `purposes`); None if none still permitted."""
    if latest.recorded_at > now:
        raise Conflict("the latest consent version is dated after now: check the clock")
    try:
        version = revise_status(latest, ConsentStatus.WITHDRAWN, recorded_at=now,
                                purposes=purposes)
    except Conflict:
        return {"version": latest.number, "digest": latest.digest,
                "change": "none (consent had already ended for these purposes)"}, None
    ctx.record_consent(version)
    return {"version": version.number, "digest": version.digest, "change": version.change}, version


def _sign_and_store(ctx: Context, *, body: dict[str, Any], entry: dict[str, Any], at: str,
                    request_id: str) -> dict[str, Any]:
    """Inside the open transaction: audit entry, signed head, proof, receipt, request done."""
    seq = ctx.audit.append(entry, at)
    ctx.audit.sign_head(ctx.signer, at)
    body["audit"] = ctx.audit.inclusion_bundle(seq)
    document = receipt.sign(ctx.signer, body)
    if not requests.mark_processed(ctx.conn, request_id, processed=PROCESSED, pending=PENDING, at=at,
                                   receipt=exports.storage_json(document)):
        raise Conflict(f"request {request_id} is not open any more")
    return document


def _common(ctx: Context, *, receipt_id: str, pid: str, request_id: str, scope: str, trigger: str,
            received: str, deadline: str, at: str, now: dt.datetime) -> dict[str, Any]:
    return {"format": receipt.FORMAT, "receipt_id": receipt_id, "vault_id": ctx.vault_id,
            "participant_id": pid, "request_id": request_id, "scope": scope, "trigger": trigger,
            "received": received, "deadline": deadline, "processed_at": at,
            "on_time": _today(now) <= dt.date.fromisoformat(deadline),
            "cautions": list(CAUTIONS)}


def _unreachable(held_in: list[dict[str, str]]) -> dict[str, Any]:
    return {"exports": held_in,
            "recipients_to_notify": sorted({e["recipient"] for e in held_in} - {"internal"}),
            "notes": [EXPORT_NOTE, BACKUP_NOTE]}


def _summary(body: dict[str, Any], document: dict[str, Any], superseded: list[str]
             ) -> dict[str, Any]:
    destroyed = body["destroyed"]
    return {"request_id": body["request_id"], "participant_id": body["participant_id"],
            "scope": body["scope"], "trigger": body["trigger"], "receipt_id": body["receipt_id"],
            "processed_at": body["processed_at"], "on_time": body["on_time"],
            "data_key_destroyed": destroyed["key_commitment"] is not None,
            "blobs_deleted": destroyed["blob_count"], "bytes_deleted": destroyed["stored_bytes"],
            "kept": body["kept"]["categories"], "stage": body["stage"]["reached"],
            "notify": body["unreachable_copies"]["exports"],
            "recipients_to_notify": body["unreachable_copies"]["recipients_to_notify"],
            "superseded_requests": superseded, "receipt": document,
            "cautions": [EXPORT_NOTE, BACKUP_NOTE, *CAUTIONS]}


def _erase(ctx: Context, pid: str, *, request_id: str, received: str, deadline: str, trigger: str,
           now: dt.datetime, new_request: bool = False, destroyed_keys: list[bytes] | None = None
           ) -> tuple[dict[str, Any], list[str]]:
    """Phase 1 of a full erasure: one transaction (see the module docstring).

    The wrapped key destroyed is appended to `destroyed_keys`, for phase 2 to check
    that no copy of it is left in the database file or its WAL.
    """
    at = iso_utc(now)
    receipt_id = "r-" + crypto.random_id(8)
    with storage.transaction(ctx.conn):
        row = requests.erasure_facts(ctx.conn, pid)
        if row is None:
            raise NotFound(f"no participant '{pid}'")
        if row[0] is None:
            raise Conflict(_erasure_note(ctx, pid))
        wrapped, commitment, had_offset, had_tag = row
        if new_request:
            requests.insert_request(ctx.conn, request_id=request_id, pid=pid, scope=SCOPE_FULL,
                                    received=received, deadline=deadline, status=PENDING)
        blobs = _blob_rows(ctx, pid)
        kinds = {k for _, k, _ in blobs}
        held_in = lineage.exports_containing(ctx.conn, pid)
        history = registry.consent_history(ctx.conn, pid)
        consent, appended = None, None
        if history and trigger == TRIGGER_REQUEST:
            consent, appended = _append_consent(ctx, history[-1], now, None)
        elif history:
            consent = {"version": history[-1].number, "digest": history[-1].digest,
                       "change": f"none ({trigger})"}
        versions = len(history) + (appended is not None)
        counts = _delete_rows(ctx, pid, None)
        ctx.door.shred(pid, at)  # the cryptographic erase
        superseded = requests.supersede_others(ctx.conn, pid, request_id, pending=PENDING,
                                               superseded=SUPERSEDED, at=at)
        blob_ids = [b for b, _, _ in blobs]
        by_kind: dict[str, int] = {}
        for _, kind, _ in blobs:
            by_kind[kind] = by_kind.get(kind, 0) + 1
        body = _common(ctx, receipt_id=receipt_id, pid=pid, request_id=request_id, scope=SCOPE_FULL,
                       trigger=trigger, received=received, deadline=deadline, at=at, now=now)
        body.update({
            "destroyed": {
                "key_commitment": commitment, "data_key": "wrapped data key destroyed "
                "(cryptographic erase): every blob, the date shift and the keyed tags of this "
                "participant are unreadable",
                "blobs": blob_ids, "blob_count": len(blobs),
                "stored_bytes": sum(s for _, _, s in blobs), "by_category": by_kind,
                "rows": {k: n for k, n in counts.items() if k != "blobs"},
                "identity_record": _IDENTITY in kinds, "date_offset": bool(had_offset),
                "lab_code_tag": bool(had_tag)},
            "kept": {"categories": [], "records": [
                "participant row: random id, key commitment, created and erased times",
                f"consent history: {versions} versions (random id, purposes, statuses, dates; "
                "no identity)",
                "audit log entries naming the random id (append-only; no names or values)",
                f"export lineage: {len(held_in)} exports that included the random id"]},
            "consent": consent, "stage": _stage(ctx, kinds, held_in),
            "unreachable_copies": _unreachable(held_in),
        })
        details = receipt.bound_fields(request_id, receipt_id, SCOPE_FULL, blob_ids, commitment)
        entry = {"actor": ctx.member, "action": receipt.ERASE_ACTION, "subjects": [pid],
                 "decision": "done",
                 "details": {**details, "trigger": trigger, "rows": counts,
                             "exports": len(held_in), "superseded": superseded}}
        document = _sign_and_store(ctx, body=body, entry=entry, at=at, request_id=request_id)
    if destroyed_keys is not None:
        destroyed_keys.append(bytes(wrapped))
    return _summary(body, document, superseded), blob_ids


def _still_granted(consent: ConsentVersion) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for purpose, entry in sorted(consent.purposes.items()):
        if entry.permits:
            for category in entry.categories:
                out.setdefault(category, []).append(purpose)
    return out


def _last_granted(history: list[ConsentVersion], purposes: list[str]) -> set[str]:
    """What each purpose granted in the latest version in which it still permitted processing."""
    out: set[str] = set()
    for purpose in purposes:
        for version in reversed(history):
            entry = version.purposes.get(purpose)
            if entry is not None and entry.permits:
                out |= entry.categories
                break
    return out


def _withdraw_purpose(ctx: Context, pid: str, *, request_id: str, received: str, deadline: str,
                      scope: str, now: dt.datetime) -> tuple[dict[str, Any], list[str]]:
    """One purpose (and its narrower children) withdrawn; unneeded categories deleted."""
    at = iso_utc(now)
    receipt_id = "r-" + crypto.random_id(8)
    purpose = _purpose(scope)
    with storage.transaction(ctx.conn):
        _require_living(ctx, pid)
        history = registry.consent_history(ctx.conn, pid)
        if not history:
            raise Conflict(f"participant '{pid}' has no consent on record; request a full withdrawal")
        named = _named_purposes(ctx.policy, history[-1], purpose)
        consent, appended = _append_consent(ctx, history[-1], now, named)
        still = _still_granted(appended or history[-1])
        candidates = _last_granted(history, named)
        blobs = _blob_rows(ctx, pid)
        gone = [(b, k, s) for b, k, s in blobs if k in candidates and k not in still]
        blob_ids = [b for b, _, _ in gone]
        kept = [{"category": c, "blobs": sum(1 for _, k, _ in blobs if k == c),
                 "still_granted_for": still[c]} for c in sorted(candidates & set(still))]
        counts = _delete_rows(ctx, pid, blob_ids)
        family = _family(ctx.policy, purpose)
        held_in = [e for e in lineage.exports_containing(ctx.conn, pid) if e["purpose"] in family]
        by_kind: dict[str, int] = {}
        for _, kind, _ in gone:
            by_kind[kind] = by_kind.get(kind, 0) + 1
        body = _common(ctx, receipt_id=receipt_id, pid=pid, request_id=request_id, scope=scope,
                       trigger=TRIGGER_REQUEST, received=received, deadline=deadline, at=at,
                       now=now)
        body.update({
            "destroyed": {
                "key_commitment": None, "data_key": "kept: the purposes still granted need the "
                "participant's other data; deleted files were overwritten, then unlinked",
                "blobs": blob_ids, "blob_count": len(gone),
                "stored_bytes": sum(s for _, _, s in gone), "by_category": by_kind,
                "rows": {k: n for k, n in counts.items() if k != "blobs"},
                "identity_record": _IDENTITY in by_kind, "date_offset": False,
                "lab_code_tag": False},
            "kept": {"categories": kept, "records": [
                "all data of categories another purpose still grants (listed)",
                "consent history, audit log and export lineage"]},
            "consent": {**consent, "purposes_withdrawn": named},
            "stage": _stage(ctx, {k for _, k, _ in blobs if k in candidates}, held_in),
            "unreachable_copies": _unreachable(held_in),
        })
        details = receipt.bound_fields(request_id, receipt_id, scope, blob_ids, None)
        entry = {"actor": ctx.member, "action": receipt.PURPOSE_ACTION, "subjects": [pid],
                 "decision": "done",
                 "details": {**details, "purposes": named, "rows": counts,
                             "consent_version": consent["version"], "exports": len(held_in)}}
        document = _sign_and_store(ctx, body=body, entry=entry, at=at, request_id=request_id)
    return _summary(body, document, []), blob_ids


# --------------------------------------------------------------------------- phase 2


def _overwrite(path: Path) -> None:
    """Zero a file in place before unlinking it (best effort; see the module docstring)."""
    try:
        fd = os.open(path, os.O_WRONLY)
    except FileNotFoundError:
        return
    try:
        size, done = os.fstat(fd).st_size, 0
        while done < size:
            done += os.write(fd, _ZEROS[: min(len(_ZEROS), size - done)])
        os.fsync(fd)
    finally:
        os.close(fd)


def _trash(ctx: Context) -> list[Path]:
    return sorted(ctx.door.tmp_dir.glob("*" + TRASH_SUFFIX))


def reclaim(ctx: Context) -> int:
    """Unlink the erased blob files set aside by `_finish_interrupted`; returns how many.

    Only disk space is at stake here: the files are ciphertext under a destroyed key
    (or already overwritten). Unlinking is O(size) on most file systems, which is why
    it is kept out of the erasure proper; any left over are removed at the next open.
    """
    files = _trash(ctx)
    for path in files:
        path.unlink(missing_ok=True)
    if files:
        fsync_path(ctx.door.tmp_dir)
    return len(files)


def _finish_interrupted(ctx: Context, blob_ids: list[str] | None = None, *, overwrite: bool = False,
                       reclaim_space: bool = True, destroyed_keys: Iterable[bytes] = ()
                       ) -> dict[str, Any]:
    """Phase 2, idempotent: move `blob_ids` out of the store, vacuum free pages, checkpoint
    and empty the WAL, then (unless `reclaim_space` is False) unlink what was moved.

    Moving is a rename into the vault's tmp/ (constant time whatever the size; tmp/ is
    emptied at every open). Safe to call at any time (e.g. at every open).

    `flushed` in the result is True only when the checkpoint was complete and no
    byte string of `destroyed_keys` is left in the database file or its WAL. When it
    is False the vault notes it (meta `erasure_unflushed`) and the next call, at the
    latest at the next open, finishes the flush and clears the note.
    """
    dirs: set[Path] = set()
    for blob_id in blob_ids or ():
        source = ctx.door.blob_path(blob_id)
        if overwrite:
            _overwrite(source)
        try:
            os.replace(source, ctx.door.tmp_dir / (blob_id + TRASH_SUFFIX))
        except FileNotFoundError:
            continue
        dirs |= {source.parent, ctx.door.tmp_dir}
    for directory in sorted(dirs):
        fsync_path(directory)
    storage.incremental_vacuum(ctx.conn)
    busy = storage.checkpoint(ctx.conn)[0]
    wal = ctx.path / (storage.DB_NAME + "-wal")
    truncated = not wal.exists() or wal.stat().st_size == 0
    keys = list(destroyed_keys)
    flushed = not busy and truncated and not any(storage.file_holds(ctx.path, k) for k in keys)
    noted = requests.has_meta(ctx.conn, _UNFLUSHED_NOTE)
    out: dict[str, Any] = {"wal_truncated": truncated, "flushed": flushed}
    if not flushed and not noted and keys:  # a key destroyed by this call is still in the file
        with storage.transaction(ctx.conn):
            storage.set_meta(ctx.conn, _UNFLUSHED_NOTE, "1")
        noted = True
    elif flushed and noted:
        with storage.transaction(ctx.conn):
            requests.delete_meta(ctx.conn, _UNFLUSHED_NOTE)
        storage.checkpoint(ctx.conn)
        out["finished_earlier_erasure"] = True
        noted = False
    out["erasure_unflushed"] = bool(noted)
    if not flushed:
        out["warning"] = UNFLUSHED
    if reclaim_space:
        out["files_unlinked"] = reclaim(ctx)
    return out


def _receipt_blobs(ctx: Context, request_id: str) -> list[str]:
    stored = requests.receipt(ctx.conn, request_id)
    if stored is None:
        return []
    return list(receipt.load(stored)["body"]["destroyed"]["blobs"])


def receipt_of(ctx: Context, target: str) -> dict[str, Any]:
    """The stored receipt of a processed request (by request id, or the participant's latest)."""
    ctx.require_steward("withdraw.receipt")
    stored = (requests.receipt(ctx.conn, target) if target.startswith("w-")
              else requests.latest_receipt(ctx.conn, target))
    if stored is None:
        raise NotFound(f"no receipt for '{target}' (is the request processed?)")
    return receipt.load(stored)


# --------------------------------------------------------------------------- retention


def _due(consent: ConsentVersion, now: dt.datetime) -> str | None:
    if not consent.is_expired(now):
        return None
    if consent.retention_end is not None and consent.retention_end <= consent.expires:
        return TRIGGER_RETENTION
    return TRIGGER_EXPIRED


def sweep(ctx: Context, *, dry_run: bool = False) -> dict[str, Any]:
    """Erase, with receipts, every participant whose consent or retention period has ended.

    Idempotent (erased participants are skipped); one transaction per participant.
    """
    now = ctx.now()
    ctx.require_steward("sweep")
    consents = registry.latest_consents(ctx.conn, None)  # living participants only
    due: list[tuple[str, str, dt.date]] = []
    no_consent, ended = 0, []
    for pid, consent in sorted(consents.items()):
        if consent is None:
            no_consent += 1
            continue
        reason = _due(consent, now)
        if reason is not None:
            due.append((pid, reason, consent.ends_at.date()))
        elif not any(e.permits for e in consent.purposes.values()):
            ended.append(pid)
    report: dict[str, Any] = {
        "checked": len(consents), "due": len(due), "no_consent_on_record": no_consent,
        "no_purpose_permits": ended, "dry_run": dry_run, "erased": []}
    if dry_run:
        report["would_erase"] = [{"participant_id": p, "trigger": r} for p, r, _ in due]
        return report
    days = ctx.policy.meta.withdrawal_deadline_days
    keys: list[bytes] = []
    for pid, reason, ended_on in due:
        result, blobs = _erase(
            ctx, pid, request_id="w-" + crypto.random_id(8), received=ended_on.isoformat(),
            deadline=(ended_on + dt.timedelta(days=days)).isoformat(), trigger=reason, now=now,
            new_request=True, destroyed_keys=keys)
        _finish_interrupted(ctx, blobs, reclaim_space=False)
        report["erased"].append({k: result[k] for k in (
            "participant_id", "request_id", "receipt_id", "trigger", "on_time", "blobs_deleted",
            "notify", "recipients_to_notify")})
    report.update(_finish_interrupted(ctx, destroyed_keys=keys))
    if not report["flushed"]:
        raise Conflict(f"sweep: {len(report['erased'])} {UNFLUSHED}")
    return report
