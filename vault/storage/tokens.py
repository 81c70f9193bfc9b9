"""SQL of member tokens (served vaults): keyed tags only, looked up by their public id."""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass


@dataclass(frozen=True)
class TokenRow:
    token_id: str
    member: str
    role: str
    tag: str
    created_at: str
    expires_at: str


def insert(conn: sqlite3.Connection, row: TokenRow) -> None:
    conn.execute("INSERT INTO member_tokens (token_id, member, role, tag, created_at, expires_at) "
                 "VALUES (?, ?, ?, ?, ?, ?)", (row.token_id, row.member, row.role, row.tag,
                                                row.created_at, row.expires_at))


def find(conn: sqlite3.Connection, token_id: str) -> TokenRow | None:
    found = conn.execute("SELECT token_id, member, role, tag, created_at, expires_at "
                         "FROM member_tokens WHERE token_id = ?", (token_id,)).fetchone()
    return None if found is None else TokenRow(*(str(v) for v in found))


def delete_for(conn: sqlite3.Connection, member: str) -> int:
    """Revoke every token of `member`; returns how many there were."""
    return conn.execute("DELETE FROM member_tokens WHERE member = ?", (member,)).rowcount


def all_rows(conn: sqlite3.Connection) -> list[TokenRow]:
    rows = conn.execute("SELECT token_id, member, role, tag, created_at, expires_at "
                        "FROM member_tokens ORDER BY member, created_at")
    return [TokenRow(*(str(v) for v in r)) for r in rows]


def roles_of(conn: sqlite3.Connection) -> dict[str, str]:
    """Member -> role of every member who holds a token."""
    rows = conn.execute("SELECT DISTINCT member, role FROM member_tokens ORDER BY member")
    return {str(m): str(r) for m, r in rows}


def member_count(conn: sqlite3.Connection) -> int:
    """How many members hold a token (0 in a vault made before tokens existed)."""
    have = conn.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'member_tokens'"
                        ).fetchone()
    if have is None:
        return 0
    return int(conn.execute("SELECT COUNT(DISTINCT member) FROM member_tokens").fetchone()[0])
