"""SQL of member notes: bodies and their MACs (the notes' logic is in vault/audit/notes.py)."""

from __future__ import annotations

import sqlite3


def add(conn: sqlite3.Connection, body: bytes, mac: bytes) -> None:
    conn.execute("INSERT INTO member_notes (body, mac) VALUES (?, ?)", (body, mac))


def all_notes(conn: sqlite3.Connection) -> list[tuple[bytes, bytes]]:
    """(body, mac) of every note, oldest first."""
    return [(r[0], r[1]) for r in conn.execute(
        "SELECT body, mac FROM member_notes ORDER BY id").fetchall()]


def clear(conn: sqlite3.Connection) -> None:
    conn.execute("DELETE FROM member_notes")
