"""SQL of the key slots: each member's wrapped key (ciphertext) and its KDF document."""

from __future__ import annotations

import sqlite3

from vault.errors import Conflict


def write_slot(conn: sqlite3.Connection, member: str, role: str, kdf: str, wrapped: bytes,
               at: str, *, replace: bool = False) -> None:
    """One member's slot; a second slot for the same member is a Conflict unless `replace`."""
    verb = "INSERT OR REPLACE" if replace else "INSERT"
    try:
        conn.execute(f"{verb} INTO keyslots (member, role, kdf, wrapped_master, created_at) "
                     "VALUES (?, ?, ?, ?, ?)", (member, role, kdf, wrapped, at))
    except sqlite3.IntegrityError as exc:
        raise Conflict(f"member '{member}' exists already") from exc


def slot(conn: sqlite3.Connection, member: str) -> tuple[str, bytes, str, str] | None:
    """(kdf document, wrapped key, role, created_at) of a member's slot, or None."""
    row = conn.execute("SELECT kdf, wrapped_master, role, created_at FROM keyslots "
                       "WHERE member = ?", (member,)).fetchone()
    return None if row is None else (str(row[0]), bytes(row[1]), str(row[2]), str(row[3]))


def drop_slots_except_kind(conn: sqlite3.Connection, kind: str) -> None:
    """Delete every slot whose KDF document is not of `kind` (a rekey's old master slots)."""
    conn.execute("DELETE FROM keyslots WHERE kdf NOT LIKE ?", (f'%"kind": "{kind}"%',))


def drop_slot(conn: sqlite3.Connection, member: str) -> None:
    conn.execute("DELETE FROM keyslots WHERE member = ?", (member,))


def count_other_slots(conn: sqlite3.Connection, member: str) -> int:
    return int(conn.execute("SELECT COUNT(*) FROM keyslots WHERE member != ?", (member,)).fetchone()[0])


def drop_others(conn: sqlite3.Connection, member: str) -> list[str]:
    """Delete every slot but `member`'s; returns the members whose slot went."""
    names = [str(r[0]) for r in conn.execute(
        "SELECT member FROM keyslots WHERE member != ? ORDER BY member", (member,))]
    conn.execute("DELETE FROM keyslots WHERE member != ?", (member,))
    return names


def holders(conn: sqlite3.Connection) -> list[tuple[str, str]]:
    """(member, role) of every key slot."""
    return [(str(m), str(r)) for m, r in conn.execute(
        "SELECT member, role FROM keyslots ORDER BY member")]
