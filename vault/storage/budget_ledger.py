"""SQL of the privacy-budget ledger: per participant and purpose, the exact spent epsilon and rho
(as decimal fraction text) and the number of releases. The accounting is in vault/privacy and
vault/services/budget.py."""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable, Iterator, Sequence

from vault.storage.db import rows_in

_SELECT = "SELECT pid, epsilon, rho, releases FROM budget_ledger WHERE purpose = ?"


def rows(conn: sqlite3.Connection, purpose: str, pids: Sequence[str] | None = None
         ) -> Iterator[tuple[str, str, str, int]]:
    """(pid, epsilon, rho, releases) of `purpose`: every row, or those of `pids`."""
    if pids is None:
        yield from conn.execute(_SELECT, (purpose,))
    else:
        yield from rows_in(conn, _SELECT + " AND pid", pids, (purpose,))


def upsert(conn: sqlite3.Connection, updates: Iterable[tuple[str, str, str, str, int]]) -> None:
    """(pid, purpose, epsilon, rho, releases): the new totals, written over any old ones."""
    conn.executemany(
        "INSERT INTO budget_ledger (pid, purpose, epsilon, rho, releases) VALUES (?, ?, ?, ?, ?) "
        "ON CONFLICT(pid, purpose) DO UPDATE SET epsilon = excluded.epsilon, "
        "rho = excluded.rho, releases = excluded.releases", updates)


def set_totals(conn: sqlite3.Connection, updates: Iterable[tuple[str, str, int, str, str]]) -> None:
    """(epsilon, rho, releases, pid, purpose): totals of existing rows."""
    conn.executemany("UPDATE budget_ledger SET epsilon = ?, rho = ?, releases = ? "
                     "WHERE pid = ? AND purpose = ?", updates)


def delete(conn: sqlite3.Connection, gone: Iterable[tuple[str, str]]) -> None:
    """(pid, purpose) rows to drop (a refund back to nothing spent)."""
    conn.executemany("DELETE FROM budget_ledger WHERE pid = ? AND purpose = ?", gone)
