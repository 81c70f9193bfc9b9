"""SQL of the audit log: its rows, its signed tree heads and the two meta values the log keeps
(the current head and its frontier). The log's logic lives in vault/audit/log.py."""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator, Sequence


def size(conn: sqlite3.Connection) -> int:
    """Rows in the log: one more than the highest sequence number (gaps are the log's to find)."""
    row = conn.execute("SELECT MAX(seq) FROM audit_log").fetchone()
    return 0 if row[0] is None else int(row[0]) + 1


def size_and_meta(conn: sqlite3.Connection, key: str) -> tuple[int, str | None]:
    """`size()` and `meta_value(key)` in one statement (every write transaction asks both)."""
    top, value = conn.execute(
        "SELECT (SELECT MAX(seq) FROM audit_log), (SELECT value FROM meta WHERE key = ?)",
        (key,)).fetchone()
    return (0 if top is None else int(top) + 1), value


def set_meta_pair(conn: sqlite3.Connection, first: tuple[str, str], second: tuple[str, str]) -> None:
    """Two meta values in one statement (runs in every write transaction)."""
    conn.execute("INSERT INTO meta (key, value) VALUES (?, ?), (?, ?) "
                 "ON CONFLICT(key) DO UPDATE SET value = excluded.value", (*first, *second))


def insert_rows(conn: sqlite3.Connection, rows: Sequence[tuple[int, bytes, bytes]]) -> None:
    """(seq, entry, leaf_hash) rows; a taken sequence number fails the transaction."""
    conn.executemany("INSERT INTO audit_log (seq, entry, leaf_hash) VALUES (?, ?, ?)", rows)


def leaf_rows_below(conn: sqlite3.Connection, top: int) -> Iterator[tuple[int, object]]:
    """(seq, stored leaf hash as stored, any type) of rows below `top`, in order."""
    yield from conn.execute("SELECT seq, leaf_hash FROM audit_log WHERE seq < ? ORDER BY seq", (top,))


def leaf_hashes_below(conn: sqlite3.Connection, top: int) -> list[bytes]:
    return [r[0] for r in conn.execute(
        "SELECT leaf_hash FROM audit_log WHERE seq < ? ORDER BY seq", (top,)).fetchall()]


def entries_from(conn: sqlite3.Connection, start: int, limit: int | None = None) -> Iterator[object]:
    """Stored entries (as stored, any type) from `start`, in order, at most `limit`."""
    for row in conn.execute("SELECT entry FROM audit_log WHERE seq >= ? ORDER BY seq LIMIT ?",
                            (start, -1 if limit is None else limit)):
        yield row[0]


def newest_entry(conn: sqlite3.Connection) -> object | None:
    row = conn.execute("SELECT entry FROM audit_log ORDER BY seq DESC LIMIT 1").fetchone()
    return None if row is None else row[0]


def entry_at(conn: sqlite3.Connection, seq: int) -> object | None:
    row = conn.execute("SELECT entry FROM audit_log WHERE seq = ?", (seq,)).fetchone()
    return None if row is None else row[0]


def all_rows(conn: sqlite3.Connection) -> Iterator[tuple[int, object, object]]:
    """(seq, entry, leaf_hash) of every row, as stored, in order."""
    yield from conn.execute("SELECT seq, entry, leaf_hash FROM audit_log ORDER BY seq")


def insert_tree_head(conn: sqlite3.Connection, tree_size: int, body: bytes, signature: bytes) -> None:
    """Keep a signed head in the durable history (one per size: the first one stays)."""
    conn.execute("INSERT OR IGNORE INTO tree_heads (tree_size, body, signature) VALUES (?, ?, ?)",
                 (tree_size, body, signature))


def latest_tree_head(conn: sqlite3.Connection) -> tuple[bytes, bytes] | None:
    row = conn.execute(
        "SELECT body, signature FROM tree_heads ORDER BY tree_size DESC LIMIT 1").fetchone()
    return None if row is None else (row[0], row[1])


def tree_heads(conn: sqlite3.Connection) -> list[tuple[bytes, bytes]]:
    """(body, signature) of every durable head, smallest first."""
    return [(r[0], r[1]) for r in conn.execute(
        "SELECT body, signature FROM tree_heads ORDER BY tree_size")]
