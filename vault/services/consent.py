"""Enrolment and consent: a participant from a filled form, new consent versions, the history,
and the check every open makes that no one edited the newest consent without the vault's keys."""

from __future__ import annotations

import json
from typing import TYPE_CHECKING, Any

from vault import crypto
from vault.errors import Conflict, IntegrityError, InvalidInput, NotFound
from vault.policy.consent import parse_consent_form, record_consent, split_identity
from vault.storage import db as storage
from vault.storage import participants, registry
from vault.times import iso_utc

if TYPE_CHECKING:
    from vault.services.context import Context


def _consent_details(version: Any) -> dict[str, Any]:
    return {"consent_version": version.number, "consent_digest": version.digest,
            "policy_version": version.policy_version,
            "purposes": {p: c.status.value for p, c in sorted(version.purposes.items())}}


def enrol(ctx: Context, form: bytes) -> dict[str, Any]:
    """Enrol a participant from a filled consent form (TOML bytes).

    Identity and contact details are stored only encrypted under the new participant's own
    key; the consent terms become version 1 under a random id."""
    ctx.require_steward("participant.enrol")
    when = ctx.now()
    identity, terms = split_identity(parse_consent_form(form, ctx.policy, now=when))
    tag = ctx.door.lab_code_tag(identity.code)
    existing = registry.pid_for_tag(ctx.conn, tag)
    if existing is not None:
        raise Conflict(f"this participant code is enrolled already (participant {existing})",
                       hint="amend-consent")
    pid = crypto.random_id(16)
    version = record_consent(terms, ctx.policy, participant_id=pid, recorded_at=when)
    key = ctx.door.new_participant(pid, ("identity-contact", [identity.to_bytes()]))
    assert key.blob is not None
    info = key.blob
    at = iso_utc(when)
    try:
        with storage.transaction(ctx.conn):
            participants.insert_participant(ctx.conn, pid, key.wrapped, key.commitment, at,
                                            lab_code_tag=tag)
            participants.insert_blob(ctx.conn, info, at)
            ctx.record_consent(version)
            ctx.audit.append({"actor": ctx.member, "action": "participant.enrol",
                              "subjects": [pid], "decision": "done",
                              "details": _consent_details(version)}, at)
    except BaseException:
        ctx.door.discard(info.blob_id)
        raise
    return {"participant_id": pid, **_consent_details(version)}


def amend_consent(ctx: Context, pid: str, form: bytes) -> dict[str, Any]:
    """Add a consent version from a new filled form (a partial withdrawal is one)."""
    ctx.require_steward("consent.amend")
    when = ctx.now()
    registry.require_participant(ctx.conn, pid)
    identity, terms = split_identity(parse_consent_form(form, ctx.policy, now=when))
    if registry.pid_for_tag(ctx.conn, ctx.door.lab_code_tag(identity.code)) != pid:
        raise InvalidInput(f"consent form: participant.code: does not belong to participant {pid}")
    history = registry.consent_history(ctx.conn, pid)
    version = record_consent(terms, ctx.policy, participant_id=pid, recorded_at=when,
                             previous=history[-1] if history else None)
    with storage.transaction(ctx.conn):
        ctx.record_consent(version)
        ctx.audit.append({"actor": ctx.member, "action": "consent.amend", "subjects": [pid],
                          "decision": "done", "details": _consent_details(version)},
                         iso_utc(when))
    return {"participant_id": pid, **_consent_details(version)}


def consent_history(ctx: Context, pid: str) -> list[dict[str, Any]]:
    """The consent versions, oldest first (kept after erasure: they name no one)."""
    ctx.require_steward("consent.show")
    if not participants.exists(ctx.conn, pid):
        raise NotFound(f"no participant '{pid}'")
    return [json.loads(v.to_json()) | {"digest": v.digest}
            for v in registry.consent_history(ctx.conn, pid)]


def check_consent_heads(ctx: Context) -> int:
    """Every living participant's newest consent against its keyed tag: a withdrawal deleted
    or a status edited in the file stops the vault. Untagged heads (vaults from before the
    tag) are tagged on trust, in one transaction with the audit entry that says so; returns
    how many were tagged."""
    untagged, bad = [], []
    for pid, tag, body in registry.consent_heads(ctx.conn):
        if body is None:
            continue
        try:
            head = registry.parse_consent(body)
            expected = ctx.door.consent_tag(pid, head.number, head.digest)
        except (IntegrityError, InvalidInput, ValueError):
            bad.append(pid)
            continue
        if tag is None:
            untagged.append((pid, expected))
        elif not crypto.constant_time_equal(tag.encode(), expected.encode()):
            bad.append(pid)
    if bad:
        raise IntegrityError(f"the newest consent of {len(bad)} participant(s) was changed or "
                             "removed without the vault's keys (first: "
                             f"{sorted(bad)[0]}); restore the database from a backup")
    if untagged:
        with storage.transaction(ctx.conn):
            for pid, expected in untagged:
                registry.set_consent_tag(ctx.conn, pid, expected)
            ctx.audit.append({"actor": ctx.member, "action": "consent.tagged", "decision": "done",
                              "details": {"participants": len(untagged)}}, ctx.stamp())
    return len(untagged)
