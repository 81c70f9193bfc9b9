"""SQL of export lineage: which exports hold whom, and for whom."""

from __future__ import annotations

import sqlite3
from collections.abc import Mapping

from vault.errors import NotFound

EXPORT_COLUMNS = ("export_id", "kind", "purpose", "recipient", "created_at")


def exports_containing(conn: sqlite3.Connection, pid: str) -> list[dict[str, str]]:
    """Earlier exports that included `pid`, with their recipients (GDPR Art. 19)."""
    rows = conn.execute(
        "SELECT e.export_id, e.kind, e.purpose, e.recipient, e.created_at FROM exports e "
        "JOIN export_members m ON m.export_id = e.export_id WHERE m.pid = ? ORDER BY e.created_at",
        (pid,)).fetchall()
    return [dict(zip(EXPORT_COLUMNS, r, strict=True)) for r in rows]


def members(conn: sqlite3.Connection, export_id: str) -> set[str]:
    """The vault ids an export holds (NotFound for an export not in the lineage)."""
    if conn.execute("SELECT 1 FROM exports WHERE export_id = ?", (export_id,)).fetchone() is None:
        raise NotFound(f"no export '{export_id}' in this vault's lineage")
    return {r[0] for r in conn.execute("SELECT pid FROM export_members WHERE export_id = ?",
                                       (export_id,))}


def record_export(conn: sqlite3.Connection, *, export_id: str, kind: str, purpose: str,
                  recipient: str, at: str, expires: str, kept: bytes, digest: str,
                  members: Mapping[str, str]) -> None:
    """An export's row (the manifest as kept) and its members (vault id -> pseudonym)."""
    conn.execute(
        "INSERT INTO exports (export_id, kind, purpose, recipient, created_at, expires_at, "
        "manifest, manifest_digest) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
        (export_id, kind, purpose, recipient, at, expires, kept, digest))
    conn.executemany(
        "INSERT INTO export_members (export_id, pid, pseudonym) VALUES (?, ?, ?)",
        [(export_id, pid, alias) for pid, alias in members.items()])


def export_terms(conn: sqlite3.Connection, export_id: str) -> tuple[str, str] | None:
    """(purpose, expires_at) of an export, or None."""
    row = conn.execute("SELECT purpose, expires_at FROM exports WHERE export_id = ?",
                       (export_id,)).fetchone()
    return None if row is None else (row[0], row[1])


def recipients(conn: sqlite3.Connection) -> list[tuple[str, str, str, int, str]]:
    """(recipient, purpose, kind, how many exports, the last one's time)."""
    return [tuple(r) for r in conn.execute(
        "SELECT recipient, purpose, kind, COUNT(*), MAX(created_at) FROM exports "
        "GROUP BY recipient, purpose, kind ORDER BY recipient, purpose")]


def member_list(conn: sqlite3.Connection, export_id: str) -> list[str]:
    """The vault ids an export holds, in the order stored."""
    return [r[0] for r in conn.execute("SELECT pid FROM export_members WHERE export_id = ?",
                                       (export_id,))]
