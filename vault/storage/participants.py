"""SQL of the participants and blobs tables: rows only, never keys in the clear."""

from __future__ import annotations

import sqlite3
from typing import Any

from vault.storage.db import rows_in

BLOB_COLUMNS = ("blob_id", "pid", "kind", "plain_size", "stored_size", "created_at")


def insert_participant(conn: sqlite3.Connection, pid: str, wrapped: bytes, commitment: str, at: str,
                       *, lab_code_tag: str | None = None) -> None:
    conn.execute(
        "INSERT INTO participants (pid, wrapped_key, key_commitment, lab_code_tag, created_at) "
        "VALUES (?, ?, ?, ?, ?)", (pid, wrapped, commitment, lab_code_tag, at))


def erase_key(conn: sqlite3.Connection, pid: str, at: str) -> None:
    """The cryptographic erase's row change: the wrapped data key, the wrapped date shift and
    the lab-code tag destroyed, the time recorded."""
    conn.execute(
        "UPDATE participants SET wrapped_key = NULL, date_offset = NULL, lab_code_tag = NULL, "
        "erased_at = ? WHERE pid = ?", (at, pid))


def count(conn: sqlite3.Connection, *, erased: bool = False) -> int:
    sql = ("SELECT COUNT(*) FROM participants WHERE wrapped_key IS NULL" if erased
           else "SELECT COUNT(*) FROM participants WHERE wrapped_key IS NOT NULL")
    return int(conn.execute(sql).fetchone()[0])


def exists(conn: sqlite3.Connection, pid: str) -> bool:
    return conn.execute("SELECT 1 FROM participants WHERE pid = ?", (pid,)).fetchone() is not None


def insert_blob(conn: sqlite3.Connection, info: Any, at: str) -> None:
    """The row of a blob file just written (`info`: a BlobInfo)."""
    conn.execute(
        "INSERT INTO blobs (blob_id, pid, kind, plain_size, stored_size, created_at) "
        "VALUES (?, ?, ?, ?, ?, ?)",
        (info.blob_id, info.pid, info.kind, info.plain_size, info.stored_size, at))


def blob_ids(conn: sqlite3.Connection) -> set[str]:
    return {r[0] for r in conn.execute("SELECT blob_id FROM blobs")}


def blobs(conn: sqlite3.Connection, pid: str | None = None) -> list[dict[str, Any]]:
    sql = "SELECT blob_id, pid, kind, plain_size, stored_size, created_at FROM blobs"
    found = conn.execute(sql + (" WHERE pid = ?" if pid else ""), (pid,) if pid else ())
    return [dict(zip(BLOB_COLUMNS, r, strict=True)) for r in found]


def living_blobs(conn: sqlite3.Connection) -> list[tuple[str, str, int]]:
    """(blob_id, pid, plain size) of every blob whose participant was not erased."""
    return [tuple(r) for r in conn.execute(
        "SELECT b.blob_id, b.pid, b.plain_size FROM blobs b JOIN participants p "
        "ON p.pid = b.pid WHERE p.wrapped_key IS NOT NULL").fetchall()]



def wrapped_key(conn: sqlite3.Connection, pid: str) -> tuple[bool, bytes | None]:
    """(the participant exists, their wrapped data key or None once erased)."""
    row = conn.execute("SELECT wrapped_key FROM participants WHERE pid = ?", (pid,)).fetchone()
    return (False, None) if row is None else (True, row[0])


def wrapped_keys(conn: sqlite3.Connection, pids: list[str]) -> dict[str, bytes | None]:
    """pid -> wrapped data key (None once erased) of those of `pids` that exist."""
    return dict(rows_in(conn, "SELECT pid, wrapped_key FROM participants WHERE pid", pids))


def living_wrapped_keys(conn: sqlite3.Connection) -> list[tuple[str, bytes]]:
    """(pid, wrapped data key) of every participant not erased."""
    return [(str(p), bytes(w)) for p, w in conn.execute(
        "SELECT pid, wrapped_key FROM participants WHERE wrapped_key IS NOT NULL").fetchall()]


def set_wrapped_key(conn: sqlite3.Connection, pid: str, wrapped: bytes) -> None:
    conn.execute("UPDATE participants SET wrapped_key = ? WHERE pid = ?", (wrapped, pid))


def wrapped_date_offset(conn: sqlite3.Connection, pid: str) -> bytes | None:
    row = conn.execute("SELECT date_offset FROM participants WHERE pid = ?", (pid,)).fetchone()
    return None if row is None or row[0] is None else bytes(row[0])


def set_wrapped_date_offset(conn: sqlite3.Connection, pid: str, wrapped: bytes) -> None:
    """Only the first shift is kept: a later one would move the participant's dates."""
    conn.execute("UPDATE participants SET date_offset = ? WHERE pid = ? AND date_offset IS NULL",
                 (wrapped, pid))


def living_pids(conn: sqlite3.Connection) -> list[str]:
    """Every participant not erased, sorted."""
    return [str(r[0]) for r in conn.execute(
        "SELECT pid FROM participants WHERE wrapped_key IS NOT NULL ORDER BY pid")]


def blob_owners(conn: sqlite3.Connection, blob_ids: list[str]) -> dict[str, tuple[str, str]]:
    """blob_id -> (pid, kind) of those of `blob_ids` that exist."""
    return {str(b): (str(p), str(k)) for b, p, k in rows_in(
        conn, "SELECT blob_id, pid, kind FROM blobs WHERE blob_id", blob_ids)}
