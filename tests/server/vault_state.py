"""What a vault holds, read from outside the service while it runs: every file's bytes (by hash)
and every database row, with the audit log kept apart (a refusal is audited, so the log may grow
where nothing else may change).

The database is read through a read-only SQLite connection of its own (WAL mode lets a reader in
while the service writes: common practice); only ciphertext, tags and metadata are in it, and
nothing read here is written anywhere."""

from __future__ import annotations

import hashlib
import sqlite3
from dataclasses import dataclass
from pathlib import Path

DB_FILES = ("vault.db", "vault.db-wal", "vault.db-shm")
LOG_TABLES = ("audit_log", "tree_heads", "member_notes")  # what a refusal may add to
LOG_META = ("audit_frontier", "audit_head")  # the log's current tip and signed head (vault/audit/log.py)


@dataclass(frozen=True)
class State:
    files: dict[str, str]  # relative path -> sha256 of its bytes (the database files excepted)
    rows: dict[str, tuple[tuple[object, ...], ...]]  # table -> its rows, sorted
    log: tuple[tuple[int, str], ...]  # (seq, sha256 of the stored entry), in order

    def changes_besides_log(self, later: State) -> list[str]:
        """What differs in `later` apart from entries appended to the log; [] when nothing."""
        changed = [f"file {name}" for name in sorted(set(self.files) | set(later.files))
                   if self.files.get(name) != later.files.get(name)]
        changed += [f"table {t}" for t in sorted(set(self.rows) | set(later.rows))
                    if self.rows.get(t) != later.rows.get(t)]
        if later.log[: len(self.log)] != self.log:
            changed.append("audit log entries changed or removed (append-only)")
        return changed


def _rows(conn: sqlite3.Connection, table: str) -> tuple[tuple[object, ...], ...]:
    rows = conn.execute(f'SELECT * FROM "{table}"').fetchall()
    if table == "meta":
        rows = [row for row in rows if row[0] not in LOG_META]
    return tuple(sorted(rows, key=repr))


def read_state(vault_path: Path) -> State:
    files = {}
    for path in sorted(vault_path.rglob("*")):
        if path.is_file() and path.name not in DB_FILES:
            files[str(path.relative_to(vault_path))] = hashlib.sha256(path.read_bytes()).hexdigest()
    conn = sqlite3.connect(f"file:{vault_path / 'vault.db'}?mode=ro", uri=True, isolation_level=None)
    try:
        conn.execute("BEGIN")  # one snapshot of every table
        tables = [r[0] for r in conn.execute(
            "SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name")]
        rows = {t: _rows(conn, t) for t in tables if t not in LOG_TABLES}
        log = tuple((seq, hashlib.sha256(entry).hexdigest()) for seq, entry in conn.execute(
            "SELECT seq, entry FROM audit_log ORDER BY seq"))
        conn.execute("COMMIT")
    finally:
        conn.close()
    return State(files, rows, log)


def folder_digest(path: Path) -> dict[str, str]:
    """Every file under `path` (database files included) by hash: for a vault nobody serves."""
    return {str(p.relative_to(path)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(path.rglob("*")) if p.is_file()}
