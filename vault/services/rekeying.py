"""A new master key and passphrase: keys are re-wrapped, data never re-encrypted."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from vault.services.members import check_passphrase
from vault.storage import db as storage
from vault.storage import participants, slots

if TYPE_CHECKING:
    from vault.services.context import Context


def rekey(ctx: Context, new_passphrase: str) -> dict[str, Any]:
    """New master key and new passphrase for this member; other members' slots are dropped."""
    ctx.require_steward("vault.rekey")
    check_passphrase(new_passphrase)
    at = ctx.stamp()
    with storage.transaction(ctx.conn):
        others = slots.count_other_slots(ctx.conn, ctx.member)
        swap = ctx.door.rekey(ctx.member, ctx.role, new_passphrase, at)
        count = participants.count(ctx.conn)
        ctx.audit.append({"actor": ctx.member, "action": "vault.rekey", "decision": "done",
                          "details": {"keys_rewrapped": count, "slots_dropped": others}}, at)
    swap()
    return {"keys_rewrapped": count, "member_slots_dropped": others}
