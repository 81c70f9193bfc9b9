"""Counting SQL for the record of processing: definitions and counts, never who."""

from __future__ import annotations

import sqlite3

_COUNTS = {
    "participants": "SELECT COUNT(*) FROM participants",
    "recordings": "SELECT COUNT(*) FROM recordings",
    "score_batches": "SELECT COUNT(*) FROM score_batches",
    "blobs": "SELECT COUNT(*) FROM blobs",
    "audit_log": "SELECT COUNT(*) FROM audit_log",
}


def rows(conn: sqlite3.Connection, table: str) -> int:
    """How many rows `table` holds (participants, recordings, score_batches, blobs, audit_log)."""
    return int(conn.execute(_COUNTS[table]).fetchone()[0])


def spent(conn: sqlite3.Connection, purpose: str) -> list[str]:
    """Each charged participant's epsilon spent for `purpose` (exact fractions as text)."""
    return [r[0] for r in conn.execute("SELECT epsilon FROM budget_ledger WHERE purpose = ?",
                                       (purpose,))]


def withdrawals(conn: sqlite3.Connection, today: str) -> tuple[int, int, int]:
    """(open, overdue on `today` (YYYY-MM-DD), processed) withdrawal requests."""
    open_, overdue = conn.execute(
        "SELECT COUNT(*), SUM(deadline < ?) FROM withdrawals WHERE status = 'pending'",
        (today,)).fetchone()
    processed = conn.execute("SELECT COUNT(*) FROM withdrawals WHERE status != 'pending'").fetchone()[0]
    return int(open_ or 0), int(overdue or 0), int(processed)
