"""Notes from members who hold no signing key (auditors), folded into the audit log later.

A member whose slot opens no vault keys cannot append to the signed log, yet their
refusals and log reads must be audited. They leave a note: canonical JSON (member,
role, action, decision, time, a random id) with an HMAC under their member key. The
next session that holds the vault's keys recomputes each member key from the vault
secret, checks every note and appends it to the log (a note whose MAC fails is logged
as rejected, without its claims), then deletes the notes in the same transaction.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any, Protocol

from vault import crypto
from vault.storage import notes as stored_notes
from vault.storage.db import Connection


class _Member(Protocol):
    role: str
    member_key: bytes


def _body(vault_id: str, fields: dict[str, Any]) -> bytes:
    return json.dumps({**fields, "vault_id": vault_id}, sort_keys=True,
                      separators=(",", ":"), ensure_ascii=True).encode()


def add(conn: Connection, vault_id: str, member: str, unlocked: _Member, action: str,
        decision: str, at: str, **details: Any) -> None:
    """Record a note by `member` (authenticated by the member key they unlocked)."""
    body = _body(vault_id, {"member": member, "role": unlocked.role, "action": action,
                            "decision": decision, "at": at, "details": details,
                            "nonce": crypto.random_id(8)})
    stored_notes.add(conn, body, crypto.hmac_sha256(unlocked.member_key, body))


def fold(conn: Connection, vault_id: str,
         member_key: Callable[[str, str], bytes]) -> list[dict[str, Any]]:
    """Audit entries for every stored note; checked notes keep their claims."""
    entries: list[dict[str, Any]] = []
    for body, mac in stored_notes.all_notes(conn):
        try:
            note = json.loads(body)
            ok = (isinstance(note, dict) and note.get("vault_id") == vault_id
                  and crypto.constant_time_equal(
                      mac, crypto.hmac_sha256(member_key(str(note["member"]), str(note["role"])),
                                              body)))
        except (ValueError, KeyError, TypeError):
            ok = False
        if not ok:
            entries.append({"actor": "unknown", "action": "member.note", "decision": "rejected",
                            "reasons": ["note-not-authentic"]})
            continue
        entries.append({"actor": note["member"], "action": note["action"],
                        "decision": note["decision"],
                        "details": {"role": note["role"], "noted_at": note["at"],
                                    "recorded_by": "member-note", "note": note.get("details", {})}})
    return entries


def clear(conn: Connection) -> None:
    stored_notes.clear(conn)
