"""SQL of recordings and score batches: formats, counts and keyed tags, never plaintext."""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable


def with_clear_metadata(conn: sqlite3.Connection) -> list[tuple[str, str]]:
    """(blob_id, de-identification report) of recordings earlier versions kept metadata of."""
    return [tuple(r) for r in conn.execute(
        "SELECT blob_id, deid FROM recordings WHERE meta != '{}'").fetchall()]


def scrub(conn: sqlite3.Connection, blob_id: str, summary: str) -> None:
    conn.execute("UPDATE recordings SET meta = '{}', deid = ? WHERE blob_id = ?", (summary, blob_id))


def insert_recording(conn: sqlite3.Connection, *, blob_id: str, pid: str, fmt: str, summary: str,
                     content_tag: str) -> None:
    conn.execute(
        "INSERT INTO recordings (blob_id, pid, format, meta, deid, content_tag) "
        "VALUES (?, ?, ?, ?, ?, ?)", (blob_id, pid, fmt, "{}", summary, content_tag))


def stored_as(conn: sqlite3.Connection, pid: str, content_tag: str) -> tuple[str, str] | None:
    """(blob_id, format) of the participant's recording with this content tag, or None."""
    row = conn.execute("SELECT blob_id, format FROM recordings WHERE pid = ? AND content_tag = ?",
                       (pid, content_tag)).fetchone()
    return None if row is None else (str(row[0]), str(row[1]))


def has_batch(conn: sqlite3.Connection, pid: str, category: str, batch_tag: str) -> bool:
    return conn.execute("SELECT 1 FROM score_batches WHERE pid = ? AND category = ? AND "
                        "batch_tag = ?", (pid, category, batch_tag)).fetchone() is not None


def has_item(conn: sqlite3.Connection, pid: str, category: str, item_tag: str) -> bool:
    return conn.execute("SELECT 1 FROM score_items WHERE pid = ? AND category = ? AND "
                        "item_tag = ?", (pid, category, item_tag)).fetchone() is not None


def insert_batch(conn: sqlite3.Connection, *, blob_id: str, pid: str, category: str, batch_tag: str,
                 item_tags: Iterable[str]) -> None:
    """A score batch's row and one row per item it holds (keyed tags only)."""
    tags = list(item_tags)
    conn.execute("INSERT INTO score_batches (blob_id, pid, category, batch_tag, rows) "
                 "VALUES (?, ?, ?, ?, ?)", (blob_id, pid, category, batch_tag, len(tags)))
    conn.executemany(
        "INSERT INTO score_items (pid, category, item_tag, blob_id) VALUES (?, ?, ?, ?)",
        [(pid, category, tag, blob_id) for tag in tags])


def recordings_of(conn: sqlite3.Connection, pids: Iterable[str]) -> list[tuple[str, str, int]]:
    """(blob id, pid, plain size) of the participants' recordings, by pid then time stored."""
    wanted = sorted(pids)
    marks = ",".join("?" * len(wanted))
    return conn.execute(
        f"SELECT r.blob_id, r.pid, b.plain_size FROM recordings r JOIN blobs b ON b.blob_id = r.blob_id "  # noqa: S608
        f"WHERE r.pid IN ({marks}) ORDER BY r.pid, b.created_at, r.blob_id", wanted).fetchall()


def living_batches(conn: sqlite3.Connection, category: str) -> list[tuple[str, str, int]]:
    """(pid, blob id, rows) of the score batches of `category` whose participant was not erased."""
    return conn.execute(
        "SELECT s.pid, s.blob_id, s.rows FROM score_batches s JOIN participants p ON p.pid = s.pid "
        "WHERE s.category = ? AND p.wrapped_key IS NOT NULL ORDER BY s.pid, s.blob_id",
        (category,)).fetchall()
