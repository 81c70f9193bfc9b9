"""Members of a served vault: tokens the steward issues, checked by the service for each call.

A token is `mwt1-<id>-<secret>` (8 random bytes of id for the look-up, 32 of secret). The vault
keeps only a keyed tag over id, member, role, expiry and secret (`KeyRing.token_tag`), so the
database alone neither yields a token nor lets anyone test one. Callers of `authenticate` see one
opaque failure; the reason goes to the audit log, never the presented text.
"""

from __future__ import annotations

import datetime as dt
import re
from collections import defaultdict, deque
from typing import TYPE_CHECKING, Any

from vault import crypto
from vault.errors import AuthenticationFailed, Conflict, NotFound, Throttled, UsageError
from vault.storage import db as storage
from vault.storage import slots
from vault.storage import tokens as rows
from vault.times import iso_utc, parse_utc

if TYPE_CHECKING:
    from vault.services.context import Context

TOKEN = re.compile(r"mwt1-([0-9a-f]{16})-([0-9a-f]{64})")
DEFAULT_DAYS, MAX_DAYS = 30, 366
FAILURES_ALLOWED, WINDOW = 10, dt.timedelta(seconds=60)
_DUMMY_SECRET = bytes(32)
OPAQUE = "authentication failed"


def served(ctx: Context) -> bool:
    return storage.find_meta(ctx.conn, "served_at") is not None


def _expiry(ctx: Context, days: int) -> str:
    if isinstance(days, bool) or not isinstance(days, int) or not 1 <= days <= MAX_DAYS:
        raise UsageError(f"a token lasts 1 to {MAX_DAYS} days", param="expires_days")
    return iso_utc(ctx.now() + dt.timedelta(days=days))


def _mint(ctx: Context, member: str, role: str, days: int, at: str) -> dict[str, Any]:
    """A new token row (inside the caller's transaction) and the text shown once."""
    token_id, secret = crypto.random_id(8), crypto.random_bytes(32)
    expires = _expiry(ctx, days)
    tag = ctx.door.token_tag(token_id, member, role, expires, secret)
    rows.insert(ctx.conn, rows.TokenRow(token_id, member, role, tag, at, expires))
    return {"member": member, "role": role, "token": f"mwt1-{token_id}-{secret.hex()}",
            "token_id": token_id, "expires_at": expires}


def member_roles(ctx: Context) -> dict[str, str]:
    """Every member: key-slot holders and token-only members."""
    return {**rows.roles_of(ctx.conn), **dict(slots.holders(ctx.conn))}


def add_token_member(ctx: Context, name: str, role: str, days: int = DEFAULT_DAYS) -> dict[str, Any]:
    """A member of a served vault with no key slot, only a token (stewards only)."""
    ctx.require_steward("member.add")
    if name in member_roles(ctx):
        raise Conflict(f"member '{name}' exists already")
    at = ctx.stamp()
    with storage.transaction(ctx.conn):
        minted = _mint(ctx, name, role, days, at)
        ctx.audit.append({"actor": ctx.member, "action": "member.add", "decision": "done",
                          "details": {"member": name, "role": role, "key_slot": False,
                                      "token": minted["token_id"],
                                      "expires_at": minted["expires_at"]}}, at)
    return minted


def issue_token(ctx: Context, member: str, days: int = DEFAULT_DAYS) -> dict[str, Any]:
    """A further token for an existing member of a served vault (stewards only)."""
    ctx.require_steward("member.token")
    if not served(ctx):
        raise UsageError("tokens are for served vaults (convert the vault first)",
                         hint="serve-setup")
    role = member_roles(ctx).get(member)
    if role is None:
        raise NotFound(f"no member '{member}'")
    at = ctx.stamp()
    with storage.transaction(ctx.conn):
        minted = _mint(ctx, member, role, days, at)
        ctx.audit.append({"actor": ctx.member, "action": "member.token", "decision": "done",
                          "details": {"member": member, "role": role, "token": minted["token_id"],
                                      "expires_at": minted["expires_at"]}}, at)
    return minted


def revoke_tokens(ctx: Context, member: str) -> dict[str, Any]:
    ctx.require_steward("member.revoke")
    if member not in member_roles(ctx):
        raise NotFound(f"no member '{member}'")
    at = ctx.stamp()
    with storage.transaction(ctx.conn):
        count = rows.delete_for(ctx.conn, member)
        ctx.audit.append({"actor": ctx.member, "action": "member.revoke", "decision": "done",
                          "details": {"member": member, "tokens": count}}, at)
    return {"member": member, "revoked": count}


def token_summary(ctx: Context) -> dict[str, dict[str, Any]]:
    """Per member: how many unexpired tokens, and the latest expiry."""
    now = ctx.now()
    out: dict[str, dict[str, Any]] = {}
    for row in rows.all_rows(ctx.conn):
        entry = out.setdefault(row.member, {"role": row.role, "tokens": 0, "expires_at": None,
                                            "created_at": row.created_at})
        if parse_utc(row.expires_at) > now:
            entry["tokens"] += 1
        entry["expires_at"] = max(filter(None, [entry["expires_at"], row.expires_at]))
    return out


class AuthGate:
    """Failed authentications per client address in a sliding window (memory only: a restart
    forgets them). Past the allowance a client is refused without a check; the refusals it
    collects are audited as one count when its window ends, so a flood cannot flood the log."""

    def __init__(self) -> None:
        self._failures: dict[str, deque[dt.datetime]] = defaultdict(deque)
        self._throttled: dict[str, int] = {}

    def _prune(self, client: str, now: dt.datetime) -> None:
        window = self._failures[client]
        while window and now - window[0] > WINDOW:
            window.popleft()

    def check(self, ctx: Context, client: str) -> None:
        now = ctx.now()
        self._prune(client, now)
        self._flush(ctx, now)
        if len(self._failures[client]) >= FAILURES_ALLOWED:
            self._throttled[client] = self._throttled.get(client, 0) + 1
            raise Throttled("too many failed authentications from this address; retry later")

    def failed(self, client: str, now: dt.datetime) -> None:
        self._failures[client].append(now)

    def _flush(self, ctx: Context, now: dt.datetime) -> None:
        done = [c for c, n in self._throttled.items() if not self._failures[c]
                or now - self._failures[c][-1] > WINDOW]
        if not done:
            return
        ctx.audit_batch([{"actor": "mindward", "action": "auth.throttled", "decision": "refuse",
                          "reasons": ["too-many-failures"],
                          "details": {"client": c, "refused": self._throttled.pop(c)}}
                         for c in sorted(done)])

    def flush_all(self, ctx: Context) -> None:
        if self._throttled:
            ctx.audit_batch([{"actor": "mindward", "action": "auth.throttled", "decision": "refuse",
                              "reasons": ["too-many-failures"],
                              "details": {"client": c, "refused": n}}
                             for c, n in sorted(self._throttled.items())])
            self._throttled.clear()


def authenticate(ctx: Context, presented: object, *, client: str, operation: str,
                 gate: AuthGate) -> tuple[str, str]:
    """(member, role) of a valid token; AuthenticationFailed (opaque) or Throttled otherwise.
    Successes and failures are audited (the failure's reason and the client; never the text)."""
    client = _client_label(client)
    operation = operation if re.fullmatch(r"[a-z0-9._/-]{1,60}", str(operation)) else "unknown"
    gate.check(ctx, client)
    now = ctx.now()
    reason, row = _check(ctx, presented, now)
    if row is None:
        gate.failed(client, now)
        ctx.audit_batch([{"actor": "mindward", "action": "auth.token", "decision": "refuse",
                          "reasons": [reason], "details": {"client": client, "operation": operation}}])
        raise AuthenticationFailed(OPAQUE)
    ctx.audit_batch([{"actor": row.member, "action": "auth.token", "decision": "permit",
                      "details": {"role": row.role, "token": row.token_id, "client": client,
                                  "operation": operation}}])
    return row.member, row.role


def _check(ctx: Context, presented: object, now: dt.datetime) -> tuple[str, rows.TokenRow | None]:
    if not served(ctx):
        return "vault-not-served", None
    if not isinstance(presented, str) or not presented:
        return "missing", None
    match = TOKEN.fullmatch(presented)
    if match is None:
        return "malformed", None
    token_id, secret = match.group(1), bytes.fromhex(match.group(2))
    row = rows.find(ctx.conn, token_id)
    if row is None:  # the same work as a real check, so timing does not tell ids apart
        ctx.door.token_tag(token_id, "-", "-", "-", _DUMMY_SECRET)
        return "unknown-or-revoked", None
    expected = ctx.door.token_tag(row.token_id, row.member, row.role, row.expires_at, secret)
    if not crypto.constant_time_equal(expected.encode(), row.tag.encode()):
        return "mismatch", None
    if parse_utc(row.expires_at) <= now:
        return "expired", None
    if member_roles(ctx).get(row.member) != row.role:
        return "role-changed", None
    return "ok", row


def _client_label(client: object) -> str:
    """An address as the audit log keeps it (printable, bounded)."""
    text = str(client)
    return text if re.fullmatch(r"[0-9A-Za-z.:\[\]_-]{1,64}", text) else "unknown"
