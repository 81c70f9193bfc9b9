"""A new master key and passphrase: keys are re-wrapped, data never re-encrypted."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from vault.errors import Conflict
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


def make_served(ctx: Context, passphrase: str) -> dict[str, Any]:
    """Convert the vault for `mindward serve`: a fresh master key under this steward's
    `passphrase`, and every other key slot removed (analysts and auditors become token-only
    members; other stewards get a token or are re-added with a passphrase). A copy of the
    files taken before still opens with an old slot, but not the keys written after."""
    ctx.require_steward("vault.serve-setup")
    if storage.find_meta(ctx.conn, "served_at") is not None:
        raise Conflict("the vault is served already")
    check_passphrase(passphrase)
    at = ctx.stamp()
    with storage.transaction(ctx.conn):
        dropped = slots.drop_others(ctx.conn, ctx.member)
        swap = ctx.door.rekey(ctx.member, ctx.role, passphrase, at)
        storage.set_meta(ctx.conn, "served_at", at)
        ctx.audit.append({"actor": ctx.member, "action": "vault.serve-setup", "decision": "done",
                          "details": {"slots_dropped": dropped,
                                      "keys_rewrapped": participants.count(ctx.conn)}}, at)
    swap()
    return {"served_at": at, "slots_dropped": dropped}
