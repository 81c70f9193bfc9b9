"""Members of the lab: who holds a key slot, with which role (stewards add and remove them)."""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from vault.errors import Conflict, NotFound, UsageError
from vault.policy.policyset import PolicySet
from vault.services import tokens
from vault.storage import db as storage
from vault.storage import lineage, registry
from vault.storage import tokens as token_rows

if TYPE_CHECKING:
    from vault.services.context import Context

MEMBER_NAME = re.compile(r"[A-Za-z0-9._-]{1,40}")


def check_member_name(name: str) -> None:
    if not MEMBER_NAME.fullmatch(name):
        raise UsageError("member names are 1-40 letters, digits, '.', '_' or '-'")


def check_passphrase(passphrase: str) -> None:
    if len(passphrase) < 12:
        raise UsageError("choose a passphrase of at least 12 characters")


def reads_data(policy: PolicySet) -> Callable[[str], bool]:
    """Which roles get a key slot that opens participant data (stewards always)."""
    return lambda role: role == "steward" or (role in policy.roles and policy.roles[role].reads_data)


def add_member(ctx: Context, name: str, role: str, passphrase: str | None, *,
               expires_days: int = tokens.DEFAULT_DAYS) -> dict[str, Any]:
    """A new member. Locally: with their own passphrase (it wraps the same master key). On a
    served vault: a token-only member (no key slot; the token is returned once), except a
    steward given a passphrase, who gets a key slot that can unlock the service."""
    ctx.require_steward("member.add")
    if role not in ctx.policy.roles:
        raise UsageError(f"unknown role '{role}'; the policy set defines "
                         + ", ".join(sorted(ctx.policy.roles)), param="role")
    check_member_name(name)
    if tokens.served(ctx):
        if passphrase is None:
            return tokens.add_token_member(ctx, name, role, expires_days)
        if role != "steward":
            raise UsageError("on a served vault only stewards hold a key slot; add this member "
                             "without a passphrase (they get a token)", param="passphrase")
        if name in tokens.member_roles(ctx):
            raise Conflict(f"member '{name}' exists already")
    elif passphrase is None:
        raise UsageError("a member of a vault that is not served needs a passphrase",
                         param="passphrase")
    check_passphrase(passphrase)
    at = ctx.stamp()
    with storage.transaction(ctx.conn):
        ctx.door.add_slot(name, role, passphrase, at, reads_data=reads_data(ctx.policy)(role))
        ctx.audit.append({"actor": ctx.member, "action": "member.add", "decision": "done",
                          "details": {"member": name, "role": role}}, at)
    return {"member": name, "role": role}


def remove_member(ctx: Context, name: str) -> dict[str, str]:
    """Remove a member: their key slot and every token they hold."""
    ctx.require_steward("member.remove")
    at = ctx.stamp()
    held = {m["member"] for m in registry.members(ctx.conn)}
    with storage.transaction(ctx.conn):
        if name in held:
            registry.remove_member(ctx.conn, name)
        revoked = token_rows.delete_for(ctx.conn, name)
        if name not in held and not revoked:
            raise NotFound(f"no member '{name}'")
        ctx.audit.append({"actor": ctx.member, "action": "member.remove", "decision": "done",
                          "details": {"member": name, "tokens_revoked": revoked}}, at)
    return {"member": name, "removed": "yes"}


def members(ctx: Context) -> list[dict[str, Any]]:
    """Member names and roles, whether each holds a key slot, and their tokens (no
    participant data; any member may list them)."""
    held = {m["member"]: m for m in registry.members(ctx.conn)}
    issued = tokens.token_summary(ctx)
    rows = []
    for name in sorted(set(held) | set(issued)):
        slot, token = held.get(name), issued.get(name, {})
        rows.append({"member": name, "role": slot["role"] if slot else token["role"],
                     "created_at": slot["created_at"] if slot else token["created_at"],
                     "key_slot": slot is not None, "tokens": token.get("tokens", 0),
                     "expires_at": token.get("expires_at")})
    return rows


def export_members(ctx: Context, export_id: str) -> set[str]:
    """The vault ids an export holds (its lineage; stewards only)."""
    ctx.require_steward("export.members")
    return lineage.members(ctx.conn, export_id)
