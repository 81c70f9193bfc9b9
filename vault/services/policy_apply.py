"""Pinning a new policy set: validated first; consent already given is not changed."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from vault.policy.policyset import PolicySet, load_policy_dir
from vault.storage import db as storage
from vault.storage import registry

if TYPE_CHECKING:
    from vault.services.context import Context


def apply_policy(ctx: Context, policy_dir: Path) -> tuple[PolicySet, dict[str, Any]]:
    """Store and pin the policy set in `policy_dir` under the vault's keyed tag (audited).
    Returns the new set, for the caller to rebuild its engine with, and the summary."""
    ctx.require_steward("policy.apply")
    policy = load_policy_dir(Path(policy_dir))
    at = ctx.stamp()
    previous = ctx.policy.version
    with storage.transaction(ctx.conn):
        new = registry.store_policy(ctx.conn, policy, at)
        storage.set_meta(ctx.conn, "policy_version", policy.version)
        storage.set_meta(ctx.conn, "policy_pin", ctx.door.policy_pin(policy.version))
        ctx.audit.append({"actor": ctx.member, "action": "policy.apply", "decision": "done",
                          "details": {"version": policy.version, "previous": previous}}, at)
    return policy, {"version": policy.version, "previous": previous, "new": new}
