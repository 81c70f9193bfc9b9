"""SQL of withdrawal requests and of what an erasure deletes (rows only; the key is shredded
by the door)."""

from __future__ import annotations

import sqlite3
from typing import Any

REQUEST_COLUMNS = "request_id, pid, scope, received, deadline, status"
_BLOB_TABLES = ("score_items", "score_batches", "recordings", "blobs")


def last_full_erasure(conn: sqlite3.Connection, pid: str, processed: str, full: str
                      ) -> tuple[str, str, int] | None:
    """(request id, processed at, has a receipt) of the participant's latest full erasure."""
    return conn.execute(
        "SELECT request_id, processed_at, receipt IS NOT NULL FROM withdrawals WHERE pid = ? AND "
        "status = ? AND scope = ? ORDER BY processed_at DESC LIMIT 1", (pid, processed, full)).fetchone()


def erased(conn: sqlite3.Connection, pid: str) -> bool | None:
    """Whether the participant was erased (None: no such participant)."""
    row = conn.execute("SELECT wrapped_key IS NULL FROM participants WHERE pid = ?", (pid,)).fetchone()
    return None if row is None else bool(row[0])


def created_at(conn: sqlite3.Connection, pid: str) -> str:
    return str(conn.execute("SELECT created_at FROM participants WHERE pid = ?", (pid,)).fetchone()[0])


def erasure_facts(conn: sqlite3.Connection, pid: str) -> tuple[bytes | None, str, int, int] | None:
    """(wrapped key, key commitment, has a date shift, has a lab-code tag), or None."""
    return conn.execute(
        "SELECT wrapped_key, key_commitment, date_offset IS NOT NULL, "
        "lab_code_tag IS NOT NULL FROM participants WHERE pid = ?", (pid,)).fetchone()


def open_request(conn: sqlite3.Connection, pid: str, scope: str, pending: str) -> str | None:
    row = conn.execute("SELECT request_id FROM withdrawals WHERE pid = ? AND scope = ? AND status = ?",
                       (pid, scope, pending)).fetchone()
    return None if row is None else str(row[0])


def insert_request(conn: sqlite3.Connection, *, request_id: str, pid: str, scope: str, received: str,
                   deadline: str, status: str) -> None:
    conn.execute(
        "INSERT INTO withdrawals (request_id, pid, scope, received, deadline, status) "
        "VALUES (?, ?, ?, ?, ?, ?)", (request_id, pid, scope, received, deadline, status))


def requests_in(conn: sqlite3.Connection, status: str) -> list[tuple[str, str, str, str, str]]:
    """(request id, pid, scope, received, deadline) by deadline, then received."""
    return conn.execute(
        "SELECT request_id, pid, scope, received, deadline FROM withdrawals WHERE status = ? "
        "ORDER BY deadline, received, request_id", (status,)).fetchall()


def request(conn: sqlite3.Connection, request_id: str) -> tuple[Any, ...] | None:
    """One request (columns as REQUEST_COLUMNS), or None."""
    return conn.execute(f"SELECT {REQUEST_COLUMNS} FROM withdrawals WHERE request_id = ?",  # noqa: S608
                        (request_id,)).fetchone()


def requests_of(conn: sqlite3.Connection, pid: str, status: str) -> list[tuple[Any, ...]]:
    """A participant's requests in `status` (columns as REQUEST_COLUMNS), oldest first."""
    return conn.execute(f"SELECT {REQUEST_COLUMNS} FROM withdrawals WHERE pid = ? AND status = ? "  # noqa: S608
                        "ORDER BY received, request_id", (pid, status)).fetchall()


def blob_rows(conn: sqlite3.Connection, pid: str) -> list[tuple[str, str, int]]:
    """(blob id, kind, stored size) of the participant's blobs."""
    return [tuple(r) for r in conn.execute(
        "SELECT blob_id, kind, stored_size FROM blobs WHERE pid = ? ORDER BY blob_id", (pid,))]


def delete_rows(conn: sqlite3.Connection, pid: str, blob_ids: list[str] | None) -> dict[str, int]:
    """Delete the rows of `blob_ids` (None: every row of the participant, their ledger too);
    how many per table."""
    counts: dict[str, int] = {}
    if blob_ids is None:
        for table in (*_BLOB_TABLES, "budget_ledger"):
            counts[table] = conn.execute(
                f"DELETE FROM {table} WHERE pid = ?", (pid,)).rowcount  # noqa: S608 (fixed names)
        return counts
    for table in _BLOB_TABLES:
        counts[table] = conn.executemany(
            f"DELETE FROM {table} WHERE blob_id = ?",  # noqa: S608 (fixed names)
            [(b,) for b in blob_ids]).rowcount
    return counts


def mark_processed(conn: sqlite3.Connection, request_id: str, *, processed: str, pending: str,
                   at: str, receipt: bytes) -> bool:
    """The request done with its receipt; False when it was not open any more."""
    done = conn.execute(
        "UPDATE withdrawals SET status = ?, processed_at = ?, receipt = ? WHERE request_id = ? "
        "AND status = ?", (processed, at, receipt, request_id, pending))
    return done.rowcount == 1


def supersede_others(conn: sqlite3.Connection, pid: str, request_id: str, *, pending: str,
                     superseded: str, at: str) -> list[str]:
    """Close the participant's other open requests as superseded; returns their ids."""
    ids = [r[0] for r in conn.execute(
        "SELECT request_id FROM withdrawals WHERE pid = ? AND status = ? AND request_id != ?",
        (pid, pending, request_id)).fetchall()]
    conn.execute(
        "UPDATE withdrawals SET status = ?, processed_at = ? WHERE pid = ? AND status = ? "
        "AND request_id != ?", (superseded, at, pid, pending, request_id))
    return ids


def receipt(conn: sqlite3.Connection, request_id: str) -> bytes | None:
    row = conn.execute("SELECT receipt FROM withdrawals WHERE request_id = ?", (request_id,)).fetchone()
    return None if row is None else row[0]


def latest_receipt(conn: sqlite3.Connection, pid: str) -> bytes | None:
    row = conn.execute(
        "SELECT receipt FROM withdrawals WHERE pid = ? AND receipt IS NOT NULL "
        "ORDER BY processed_at DESC, rowid DESC LIMIT 1", (pid,)).fetchone()
    return None if row is None else row[0]


def has_meta(conn: sqlite3.Connection, key: str) -> bool:
    return conn.execute("SELECT 1 FROM meta WHERE key = ?", (key,)).fetchone() is not None


def delete_meta(conn: sqlite3.Connection, key: str) -> None:
    conn.execute("DELETE FROM meta WHERE key = ?", (key,))
