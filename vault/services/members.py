"""Members of the lab: who holds a key slot, with which role (stewards add and remove them)."""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import TYPE_CHECKING

from vault.errors import UsageError
from vault.policy.policyset import PolicySet
from vault.storage import db as storage
from vault.storage import lineage, registry

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


def add_member(ctx: Context, name: str, role: str, passphrase: str) -> dict[str, str]:
    """A new member with their own passphrase (it wraps the same master key)."""
    ctx.require_steward("member.add")
    if role not in ctx.policy.roles:
        raise UsageError(f"unknown role '{role}'; the policy set defines "
                         + ", ".join(sorted(ctx.policy.roles)))
    check_member_name(name)
    check_passphrase(passphrase)
    at = ctx.stamp()
    with storage.transaction(ctx.conn):
        ctx.door.add_slot(name, role, passphrase, at, reads_data=reads_data(ctx.policy)(role))
        ctx.audit.append({"actor": ctx.member, "action": "member.add", "decision": "done",
                          "details": {"member": name, "role": role}}, at)
    return {"member": name, "role": role}


def remove_member(ctx: Context, name: str) -> dict[str, str]:
    ctx.require_steward("member.remove")
    at = ctx.stamp()
    with storage.transaction(ctx.conn):
        registry.remove_member(ctx.conn, name)
        ctx.audit.append({"actor": ctx.member, "action": "member.remove", "decision": "done",
                          "details": {"member": name}}, at)
    return {"member": name, "removed": "yes"}


def members(ctx: Context) -> list[dict[str, str]]:
    """Member names and roles (no participant data; any member may list them)."""
    return registry.members(ctx.conn)


def export_members(ctx: Context, export_id: str) -> set[str]:
    """The vault ids an export holds (its lineage; stewards only)."""
    ctx.require_steward("export.members")
    return lineage.members(ctx.conn, export_id)
