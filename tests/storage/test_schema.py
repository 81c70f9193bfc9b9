"""The schema written in plain SQL against the one sqlite-utils (an independent DDL writer,
test extra only) builds from the same table definitions: same tables, columns, keys, indexes."""

from __future__ import annotations

import sqlite3

import pytest

from vault.storage import db as storage

sqlite_utils = pytest.importorskip("sqlite_utils")


def _reference() -> sqlite3.Connection:
    """The schema as the vault built it with sqlite-utils before this module wrote its own SQL."""
    conn = sqlite3.connect(":memory:")
    db = sqlite_utils.Database(conn)
    for name, (columns, pk) in storage._TABLES.items():
        db[name].create(columns, pk=pk, not_null=storage._NOT_NULL[name])
    for table, columns, unique in storage._INDEXES:
        db[table].create_index(list(columns), unique=unique)
    return conn


def _ours() -> sqlite3.Connection:
    conn = sqlite3.connect(":memory:", isolation_level=None)
    storage.create_schema(conn)
    return conn


def _shape(conn: sqlite3.Connection) -> dict[str, object]:
    tables = [r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")]
    return {t: (conn.execute(f'PRAGMA table_info("{t}")').fetchall(),
                sorted(conn.execute(f'PRAGMA index_list("{t}")').fetchall())) for t in tables}


def test_tables_and_indexes_match_the_sqlite_utils_schema() -> None:
    ours, ref = _ours(), _reference()
    ref_sql = dict(ref.execute("SELECT name, sql FROM sqlite_master WHERE sql IS NOT NULL"))
    our_sql = dict(ours.execute("SELECT name, sql FROM sqlite_master WHERE type = 'table' OR "
                                "(type = 'index' AND sql IS NOT NULL)"))
    our_sql.pop("idx_recordings_pid_content_tag")  # added by hand, as before
    assert our_sql == ref_sql
    shape = _shape(ours)
    assert shape.keys() == _shape(ref).keys()
    for table, (columns, _) in _shape(ref).items():
        assert shape[table][0] == columns, table


def test_a_missing_table_is_added_at_open_and_nothing_else_changes() -> None:
    conn = _ours()
    conn.execute('DROP TABLE "member_notes"')
    before = set(conn.execute("SELECT name FROM sqlite_master"))
    storage.add_missing_tables(conn)
    after = set(conn.execute("SELECT name FROM sqlite_master"))
    assert after - before == {("member_notes",)}
    storage.add_missing_tables(conn)  # idempotent
    assert set(conn.execute("SELECT name FROM sqlite_master")) == after
