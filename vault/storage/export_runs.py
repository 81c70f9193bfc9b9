"""SQL of export runs (the crash-safe steps of an export) and their per-participant charges."""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable
from typing import Any

RUN_COLUMNS = "export_id, kind, purpose, staging, out, state, charged_purposes, signed"


def insert_run(conn: sqlite3.Connection, *, export_id: str, kind: str, purpose: str, staging: str,
               out: str, state: str, charged: str, at: str) -> None:
    conn.execute(
        "INSERT INTO export_runs (export_id, kind, purpose, staging, out, state, "
        "charged_purposes, started_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
        (export_id, kind, purpose, staging, out, state, charged, at))


def insert_charges(conn: sqlite3.Connection, export_id: str,
                   charges: Iterable[tuple[str, str, str]]) -> None:
    """(pid, epsilon, rho) rows, the exact fractions as text."""
    conn.executemany(
        "INSERT INTO export_charges (export_id, pid, epsilon, rho) VALUES (?, ?, ?, ?)",
        [(export_id, pid, e, r) for pid, e, r in charges])


def charges(conn: sqlite3.Connection, export_id: str) -> list[tuple[str, str, str]]:
    return [tuple(r) for r in conn.execute(
        "SELECT pid, epsilon, rho FROM export_charges WHERE export_id = ?", (export_id,))]


def set_state(conn: sqlite3.Connection, export_id: str, state: str) -> None:
    conn.execute("UPDATE export_runs SET state = ? WHERE export_id = ?", (state, export_id))


def set_signed(conn: sqlite3.Connection, export_id: str, state: str, signed: bytes) -> None:
    conn.execute("UPDATE export_runs SET state = ?, signed = ? WHERE export_id = ?",
                 (state, signed, export_id))


def settle(conn: sqlite3.Connection, export_id: str, state: str, at: str) -> None:
    """The final state; the signed copy and the charges are no longer needed."""
    conn.execute("UPDATE export_runs SET state = ?, ended_at = ?, signed = NULL "
                 "WHERE export_id = ?", (state, at, export_id))
    conn.execute("DELETE FROM export_charges WHERE export_id = ?", (export_id,))


def run(conn: sqlite3.Connection, export_id: str) -> tuple[Any, ...] | None:
    """One run's row (columns as RUN_COLUMNS), or None."""
    return conn.execute(f"SELECT {RUN_COLUMNS} FROM export_runs WHERE export_id = ?",  # noqa: S608
                        (export_id,)).fetchone()


def runs_in(conn: sqlite3.Connection, states: tuple[str, ...]) -> list[tuple[Any, ...]]:
    """Runs in any of `states`, oldest first."""
    marks = ", ".join("?" * len(states))
    return conn.execute(
        f"SELECT {RUN_COLUMNS} FROM export_runs WHERE state IN ({marks}) "  # noqa: S608
        "ORDER BY started_at, export_id", states).fetchall()
