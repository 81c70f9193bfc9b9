"""The audit log from inside an open vault: reading it (roles the policy set allows), checking
it with every stored blob, and signing a tree head over it."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from vault.audit import log as audit
from vault.errors import PolicyRefusal
from vault.storage import db as storage

if TYPE_CHECKING:
    from vault.services.context import Context


def audit_entries(ctx: Context, start: int = 0, limit: int | None = None) -> list[dict[str, Any]]:
    """Entries of the log, for roles the policy set lets read it (the read and a refusal are
    both audited)."""
    role = ctx.policy.roles.get(ctx.role)
    if role is None or not role.reads_audit:
        ctx.audit_batch([{"actor": ctx.member, "action": "audit.show", "decision": "refuse",
                          "reasons": ["role-not-allowed"], "details": {"role": ctx.role}}])
        raise PolicyRefusal(f"member '{ctx.member}' ({ctx.role}) may not read the audit log")
    entries = ctx.audit.entries(start, limit)
    ctx.audit_batch([{"actor": ctx.member, "action": "audit.show", "decision": "done",
                      "details": {"start": start, "entries": len(entries)}}])
    return entries


def verify(ctx: Context, trusted: list[audit.TreeHead] | None = None) -> dict[str, Any]:
    """Check the audit log and authenticate every stored blob (no plaintext leaves)."""
    ctx.require_steward("vault.verify")
    report = audit.verify_log(ctx.conn, ctx.public_key, trusted or [])
    checked, bad = ctx.door.authenticate_all()
    return {"audit": report.as_dict(), "blobs_checked": checked, "blobs_failed": bad,
            "ok": report.ok and not bad}


def sign_head(ctx: Context) -> audit.TreeHead:
    ctx.require_steward("audit.head")
    with storage.transaction(ctx.conn):
        return ctx.audit.sign_head(ctx.signer, ctx.stamp())
