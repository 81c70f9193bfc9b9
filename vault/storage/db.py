"""The vault's SQLite database: schema, pragmas, transactions.

Holds ciphertext, wrapped keys and metadata only; this module never sees a key
or a plaintext and never imports the crypto module. WAL mode with
synchronous=FULL (a committed transaction survives power loss), secure_delete
on (freed pages are zeroed), incremental auto-vacuum (so erasure can hand
free pages back to the file system).
"""

from __future__ import annotations

import mmap
import os
import sqlite3
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager, suppress
from pathlib import Path
from typing import Any

from vault.errors import Conflict, IntegrityError, StorageFull

# The connection type and SQLite's error, for the rooms above storage (only storage imports sqlite3).
Connection = sqlite3.Connection
DatabaseError = sqlite3.DatabaseError

SCHEMA_VERSION = 1
DB_NAME = "vault.db"
IN_CHUNK = 500  # bound values per IN (...) query, under SQLite's old default limit of 999

_TABLES: dict[str, tuple[dict[str, type], str | tuple[str, ...]]] = {
    "meta": ({"key": str, "value": str}, "key"),
    # one row per member: the master key wrapped under a key from that member's passphrase
    "keyslots": (
        {"member": str, "role": str, "kdf": str, "wrapped_master": bytes, "created_at": str},
        "member",
    ),
    # one row per participant; wrapped_key NULL once erased (cryptographic erase)
    "participants": (
        {"pid": str, "wrapped_key": bytes, "key_commitment": str, "lab_code_tag": str,
         "date_offset": bytes, "created_at": str, "erased_at": str,
         # keyed tag of the newest consent version: a version deleted or edited by anyone
         # without the vault's keys no longer matches it (checked at open)
         "consent_tag": str},
        "pid",
    ),
    # the policy sets this vault has applied, by content hash
    "policy_versions": ({"version": str, "body": bytes, "applied_at": str}, "version"),
    # append-only consent versions (random participant ids, purposes, statuses, dates)
    "consents": (
        {"pid": str, "number": int, "body": bytes, "digest": str, "recorded_at": str},
        ("pid", "number"),
    ),
    "blobs": (
        {"blob_id": str, "pid": str, "kind": str, "plain_size": int, "stored_size": int,
         "created_at": str},
        "blob_id",
    ),
    # a stored recording: its format and counts of what de-identification replaced (the
    # channel metadata is read from the encrypted file's own header); content_tag is an HMAC
    # of the input file under the participant's own data key (re-ingest is idempotent)
    "recordings": ({"blob_id": str, "pid": str, "format": str, "meta": str, "deid": str,
                    "content_tag": str}, "blob_id"),
    # one encrypted batch of scores or ratings per participant per ingested file;
    # tags are HMACs under the participant's own data key (gone when they are erased)
    "score_batches": (
        {"blob_id": str, "pid": str, "category": str, "batch_tag": str, "rows": int}, "blob_id"),
    "score_items": ({"pid": str, "category": str, "item_tag": str, "blob_id": str},
                    ("pid", "category", "item_tag")),
    # export lineage: what left the vault, for which purpose, to whom, containing whom
    "exports": ({"export_id": str, "kind": str, "purpose": str, "recipient": str,
                 "created_at": str, "expires_at": str, "manifest": bytes, "manifest_digest": str},
                "export_id"),
    "export_members": ({"export_id": str, "pid": str, "pseudonym": str}, ("export_id", "pid")),
    # an export in progress (state staged -> writing -> signed -> done; or refunded / void), so
    # the next open can finish or undo one that was killed; `signed` holds the signed manifest
    # until the folder is in place (then NULL)
    "export_runs": ({"export_id": str, "kind": str, "purpose": str, "staging": str, "out": str,
                     "state": str, "charged_purposes": str, "signed": bytes, "started_at": str,
                     "ended_at": str}, "export_id"),
    # what a staged release charged each participant, until it is done or refunded (then deleted)
    "export_charges": ({"export_id": str, "pid": str, "epsilon": str, "rho": str},
                       ("export_id", "pid")),
    # privacy budget spent per participant and purpose (exact fractions as text)
    "budget_ledger": ({"pid": str, "purpose": str, "epsilon": str, "rho": str, "releases": int},
                      ("pid", "purpose")),
    # withdrawal requests and their outcome
    "withdrawals": ({"request_id": str, "pid": str, "scope": str, "received": str, "deadline": str,
                     "status": str, "processed_at": str, "receipt": bytes}, "request_id"),
    "audit_log": ({"seq": int, "entry": bytes, "leaf_hash": bytes}, "seq"),
    "tree_heads": ({"tree_size": int, "body": bytes, "signature": bytes}, "tree_size"),
    # notes (refusals, log reads) by members who hold no signing key; folded into the log
    "member_notes": ({"id": int, "body": bytes, "mac": bytes}, "id"),
    # tokens of a served vault's members: a keyed tag over id, member, role, expiry and secret
    # (never the secret); revoking deletes the row
    "member_tokens": ({"token_id": str, "member": str, "role": str, "tag": str,
                       "created_at": str, "expires_at": str}, "token_id"),
}

_NOT_NULL: dict[str, set[str]] = {
    "meta": {"value"},
    "keyslots": {"role", "kdf", "wrapped_master", "created_at"},
    "participants": {"key_commitment", "created_at"},
    "policy_versions": {"body", "applied_at"},
    "consents": {"body", "digest", "recorded_at"},
    "blobs": {"pid", "kind", "plain_size", "stored_size", "created_at"},
    "recordings": {"pid", "format", "meta", "deid"},
    "score_batches": {"pid", "category", "batch_tag", "rows"},
    "score_items": {"blob_id"},
    "exports": {"kind", "purpose", "created_at", "manifest", "manifest_digest"},
    "export_members": {"pseudonym"},
    "export_runs": {"kind", "purpose", "staging", "out", "state", "charged_purposes",
                    "started_at"},
    "export_charges": {"epsilon", "rho"},
    "budget_ledger": {"epsilon", "rho", "releases"},
    "withdrawals": {"pid", "scope", "received", "deadline", "status"},
    "audit_log": {"entry", "leaf_hash"},
    "tree_heads": {"body", "signature"},
    "member_notes": {"body", "mac"},
    "member_tokens": {"member", "role", "tag", "created_at", "expires_at"},
}

_APPEND_ONLY_TRIGGERS = """
CREATE TRIGGER IF NOT EXISTS {table}_no_update BEFORE UPDATE ON {table}
BEGIN SELECT RAISE(ABORT, '{table} is append-only'); END;
CREATE TRIGGER IF NOT EXISTS {table}_no_delete BEFORE DELETE ON {table}
BEGIN SELECT RAISE(ABORT, '{table} is append-only'); END;
"""


def _private_files(path: Path) -> None:
    """Make the database file 0600 before SQLite opens it, whatever the umask.

    SQLite gives the -wal and -shm files it creates the database file's mode, so
    they are 0600 too. Files of an older vault that were looser are tightened.
    """
    with suppress(FileExistsError):
        os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
    for name in (DB_NAME, DB_NAME + "-wal", DB_NAME + "-shm"):
        try:
            if (path.parent / name).stat().st_mode & 0o077:
                os.chmod(path.parent / name, 0o600)
        except (FileNotFoundError, PermissionError):  # gone, or another user's file: leave it
            continue


def connect(directory: Path, *, readonly: bool = False) -> sqlite3.Connection:
    """Open the vault database with the pragmas every connection must have."""
    path = directory / DB_NAME
    if readonly:
        conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True, isolation_level=None)
    else:
        _private_files(path)
        conn = sqlite3.connect(path, isolation_level=None)
    try:
        conn.execute("PRAGMA secure_delete = ON")
        conn.execute("PRAGMA foreign_keys = ON")
        conn.execute("PRAGMA busy_timeout = 10000")
        if not readonly:
            conn.execute("PRAGMA journal_mode = WAL")
            conn.execute("PRAGMA synchronous = FULL")
        conn.execute("SELECT COUNT(*) FROM sqlite_master").fetchone()
    except sqlite3.DatabaseError as exc:
        conn.close()
        raise IntegrityError(f"{path} is unreadable or not a vault database") from exc
    return conn




_SQL_TYPES = {str: "TEXT", int: "INTEGER", bytes: "BLOB", float: "REAL"}
_INDEXES: tuple[tuple[str, tuple[str, ...], bool], ...] = (
    ("blobs", ("pid",), False),
    ("participants", ("lab_code_tag",), True),
    ("score_batches", ("pid", "category", "batch_tag"), True),
    ("recordings", ("pid",), False),
    ("export_members", ("pid",), False),
    ("withdrawals", ("pid",), False),
)


def _table_sql(name: str) -> str:
    """CREATE TABLE for one entry of _TABLES (the text sqlite-utils wrote for it before:
    tests/storage compares the two)."""
    columns, pk = _TABLES[name]
    single = pk if isinstance(pk, str) else None
    lines = [f'   "{column}" {_SQL_TYPES[kind]}' + (" PRIMARY KEY" if column == single else "")
             + (" NOT NULL" if column in _NOT_NULL[name] else "") for column, kind in columns.items()]
    if single is None:
        lines.append("   PRIMARY KEY (" + ", ".join(f'"{c}"' for c in pk) + ")")
    return f'CREATE TABLE "{name}" (\n' + ",\n".join(lines) + "\n)"


def _index_sql(table: str, columns: tuple[str, ...], unique: bool) -> str:
    return (f'CREATE {"UNIQUE " if unique else ""}INDEX "idx_{table}_{"_".join(columns)}"\n'
            f'    ON "{table}" (' + ", ".join(f'"{c}"' for c in columns) + ")")


def create_schema(conn: sqlite3.Connection) -> None:
    conn.execute("PRAGMA auto_vacuum = INCREMENTAL")
    conn.execute("VACUUM")  # auto_vacuum takes effect only on an empty database after VACUUM
    for name in _TABLES:
        conn.execute(_table_sql(name))
    for table, columns, unique in _INDEXES[:4]:
        conn.execute(_index_sql(table, columns, unique))
    _additive_indexes(conn)
    for table, columns, unique in _INDEXES[4:]:
        conn.execute(_index_sql(table, columns, unique))
    for table in ("audit_log", "tree_heads", "consents", "policy_versions"):
        conn.executescript(_APPEND_ONLY_TRIGGERS.format(table=table))


def _additive_indexes(conn: sqlite3.Connection) -> None:
    conn.execute("CREATE UNIQUE INDEX IF NOT EXISTS idx_recordings_pid_content_tag "
                 "ON recordings (pid, content_tag)")


def add_missing_columns(conn: sqlite3.Connection) -> list[str]:
    """Add columns (nullable) and indexes that this version's schema has and the database
    lacks: additive changes within one SCHEMA_VERSION. Returns "table.column" names added."""
    added = []
    types = {str: "TEXT", int: "INTEGER", bytes: "BLOB", float: "FLOAT"}
    for table, (columns, _) in _TABLES.items():
        have = {row[1] for row in conn.execute(f"PRAGMA table_info({table})")}
        for column, kind in columns.items():
            if have and column not in have:
                conn.execute(f"ALTER TABLE {table} ADD COLUMN {column} {types[kind]}")
                added.append(f"{table}.{column}")
    _additive_indexes(conn)
    return added


def add_missing_tables(conn: sqlite3.Connection) -> None:
    """Create the tables added within schema 1 in a vault made before them (additive only)."""
    have = {row[0] for row in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    missing = [name for name in _TABLES if name not in have]
    if not missing:
        return
    with transaction(conn):
        for name in missing:
            conn.execute(_table_sql(name))


@contextmanager
def transaction(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    """One durable write transaction (BEGIN IMMEDIATE ... COMMIT, rollback on error)."""
    try:
        conn.execute("BEGIN IMMEDIATE")
    except sqlite3.OperationalError as exc:
        raise Conflict("the vault is busy (another process holds the write lock)") from exc
    try:
        yield conn
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    try:
        conn.execute("COMMIT")
    except sqlite3.OperationalError as exc:
        conn.execute("ROLLBACK")
        if "full" in str(exc).lower():
            raise StorageFull("the disk is full; the change was rolled back") from exc
        raise


def find_meta(conn: sqlite3.Connection, key: str) -> str | None:
    """A meta value, or None where it is not set."""
    row = conn.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
    return None if row is None else str(row[0])


def get_meta(conn: sqlite3.Connection, key: str) -> str:
    """A meta value the vault cannot do without (IntegrityError where it is missing)."""
    value = find_meta(conn, key)
    if value is None:
        raise IntegrityError(f"vault metadata '{key}' is missing")
    return value


def set_meta(conn: sqlite3.Connection, key: str, value: str) -> None:
    conn.execute(
        "INSERT INTO meta (key, value) VALUES (?, ?) "
        "ON CONFLICT(key) DO UPDATE SET value = excluded.value",
        (key, value),
    )


def checkpoint(conn: sqlite3.Connection) -> tuple[int, int, int]:
    """Fold the WAL into the main file and truncate it (used after erasure).

    Returns SQLite's (busy, wal pages, pages checkpointed); busy = 1 means a reader
    kept the WAL from being emptied.
    """
    row = conn.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()
    return int(row[0]), int(row[1]), int(row[2])


def file_holds(directory: Path, needle: bytes) -> bool:
    """True while the database file or its WAL still holds `needle` byte for byte
    (a destroyed wrapped key, say: erasure checks that it left the file)."""
    for name in (DB_NAME, DB_NAME + "-wal"):
        try:
            with open(directory / name, "rb") as fh:
                if os.fstat(fh.fileno()).st_size == 0:
                    continue
                with mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as view:
                    if view.find(needle) >= 0:
                        return True
        except FileNotFoundError:
            continue
    return False


def incremental_vacuum(conn: sqlite3.Connection) -> None:
    """Hand every free page back to the file system. `conn.execute("PRAGMA incremental_vacuum")`
    frees ONE page per call under Python's sqlite3 (it steps the statement once);
    executescript runs it to completion."""
    conn.executescript("PRAGMA incremental_vacuum;")


def rows_in(conn: sqlite3.Connection, sql: str, values: Iterable[Any],
            params: Sequence[Any] = ()) -> Iterator[Any]:
    """Rows of `sql` + " IN (?, ...)" over `values`, one query per IN_CHUNK distinct values.

    `sql` ends with the column compared; `params` bind its own '?' marks. Only '?' marks are
    added to the text, never a value. Each matching row comes once, even for repeated values.
    """
    distinct = list(dict.fromkeys(values))
    for start in range(0, len(distinct), IN_CHUNK):
        chunk = distinct[start : start + IN_CHUNK]
        marks = ",".join("?" * len(chunk))
        yield from conn.execute(sql + " IN (" + marks + ")", (*params, *chunk))
