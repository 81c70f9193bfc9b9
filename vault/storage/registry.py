"""Rows of the vault that are not ciphertext: policy versions, consent versions, members.

Plain SQL over the open connection; no keys, no plaintext of participant data
(consent versions carry random participant ids, purposes, statuses and dates).
"""

from __future__ import annotations

import sqlite3
from collections.abc import Mapping, Sequence
from functools import lru_cache

from vault.errors import Conflict, IntegrityError, NotFound
from vault.policy.consent import ConsentVersion, verify_history
from vault.policy.policyset import PolicySet, parse_policy_json
from vault.storage import db as storage
from vault.storage import slots
from vault.times import iso_utc


def store_policy(conn: sqlite3.Connection, policy: PolicySet, at: str) -> bool:
    """Record a policy version (idempotent); True when it is new."""
    cur = conn.execute(
        "INSERT OR IGNORE INTO policy_versions (version, body, applied_at) VALUES (?, ?, ?)",
        (policy.version, policy.canonical_json(), at))
    return cur.rowcount == 1


def load_policy(conn: sqlite3.Connection, version: str) -> PolicySet:
    row = conn.execute("SELECT body FROM policy_versions WHERE version = ?", (version,)).fetchone()
    if row is None:
        raise IntegrityError(f"policy version {version} is missing from the vault")
    policy = parse_policy_json(row[0])
    if policy.version != version:
        raise IntegrityError(f"stored policy version {version} does not match its content")
    return policy


def add_consent(conn: sqlite3.Connection, version: ConsentVersion) -> None:
    conn.execute(
        "INSERT INTO consents (pid, number, body, digest, recorded_at) VALUES (?, ?, ?, ?, ?)",
        (version.participant_id, version.number, version.to_json(), version.digest,
         iso_utc(version.recorded_at)))


def consent_history(conn: sqlite3.Connection, pid: str) -> list[ConsentVersion]:
    rows = conn.execute("SELECT body FROM consents WHERE pid = ? ORDER BY number", (pid,)).fetchall()
    versions = [ConsentVersion.from_json(r[0]) for r in rows]
    if versions:
        verify_history(versions)
    return versions


def latest_consents(conn: sqlite3.Connection, pids: Sequence[str] | None
                    ) -> dict[str, ConsentVersion | None]:
    """Current consent version of each (living) participant; None when there is none."""
    if pids is None:
        rows = conn.execute(
            "SELECT p.pid, c.body FROM participants p LEFT JOIN consents c ON c.pid = p.pid "
            "AND c.number = (SELECT MAX(number) FROM consents WHERE pid = p.pid) "
            "WHERE p.wrapped_key IS NOT NULL").fetchall()
    else:
        rows = list(storage.rows_in(
            conn, "SELECT p.pid, c.body FROM participants p LEFT JOIN consents c ON c.pid = p.pid "
                  "AND c.number = (SELECT MAX(number) FROM consents WHERE pid = p.pid) "
                  "WHERE p.wrapped_key IS NOT NULL AND p.pid", pids))
    return {pid: None if body is None else _parsed(body) for pid, body in rows}


def consent_heads(conn: sqlite3.Connection) -> list[tuple[str, str | None, bytes | None]]:
    """(pid, stored consent tag, body of the newest version or None) of living participants."""
    return conn.execute(
        "SELECT p.pid, p.consent_tag, c.body FROM participants p LEFT JOIN consents c "
        "ON c.pid = p.pid AND c.number = (SELECT MAX(number) FROM consents WHERE pid = p.pid) "
        "WHERE p.wrapped_key IS NOT NULL").fetchall()


def set_consent_tag(conn: sqlite3.Connection, pid: str, tag: str) -> None:
    conn.execute("UPDATE participants SET consent_tag = ? WHERE pid = ?", (tag, pid))


@lru_cache(maxsize=262_144)
def _parsed(body: bytes) -> ConsentVersion:
    """Stored versions are immutable, so the same bytes always parse to the same (frozen) model."""
    return ConsentVersion.from_json(body)


def parse_consent(body: bytes) -> ConsentVersion:
    return _parsed(body)


def forget_parsed_consents() -> None:
    """Drop the parse cache, so the next reads cost what they cost a new process (benchmarks)."""
    _parsed.cache_clear()


def pid_for_tag(conn: sqlite3.Connection, tag: str) -> str | None:
    row = conn.execute("SELECT pid FROM participants WHERE lab_code_tag = ?", (tag,)).fetchone()
    return None if row is None else str(row[0])


def require_participant(conn: sqlite3.Connection, pid: str) -> None:
    row = conn.execute("SELECT wrapped_key IS NULL FROM participants WHERE pid = ?", (pid,)).fetchone()
    if row is None:
        raise NotFound(f"no participant '{pid}'")
    if row[0]:
        raise Conflict(f"participant '{pid}' was erased")


def members(conn: sqlite3.Connection) -> list[dict[str, str]]:
    rows = conn.execute("SELECT member, role, created_at FROM keyslots ORDER BY member")
    return [{"member": m, "role": r, "created_at": c} for m, r, c in rows]


def remove_member(conn: sqlite3.Connection, member: str) -> None:
    roles: Mapping[str, str] = {m["member"]: m["role"] for m in members(conn)}
    if member not in roles:
        raise NotFound(f"no member '{member}'")
    if roles[member] == "steward" and sum(r == "steward" for r in roles.values()) == 1:
        raise Conflict("refusing to remove the last steward")
    slots.drop_slot(conn, member)

