"""The chunked IN (...) query helper against a plain Python filter of the same rows."""

from __future__ import annotations

import sqlite3
from unittest import mock

from hypothesis import given, settings
from hypothesis import strategies as st

from vault.storage import db as storage

KEYS = st.integers(min_value=0, max_value=40)


def _table(rows: list[tuple[int, int]]) -> sqlite3.Connection:
    conn = sqlite3.connect(":memory:")
    conn.execute("CREATE TABLE t (k INTEGER PRIMARY KEY, grp INTEGER)")
    conn.executemany("INSERT INTO t VALUES (?, ?)", rows)
    return conn


@settings(max_examples=200, deadline=None)
@given(stored=st.dictionaries(KEYS, st.integers(0, 2), max_size=60),
       asked=st.lists(KEYS, max_size=80), group=st.integers(0, 2), chunk=st.integers(1, 9))
def test_rows_in_returns_each_matching_row_once_across_chunks(
        stored: dict[int, int], asked: list[int], group: int, chunk: int) -> None:
    conn = _table(sorted(stored.items()))
    with mock.patch.object(storage, "IN_CHUNK", chunk):  # small chunks: many boundaries
        got = list(storage.rows_in(conn, "SELECT k, grp FROM t WHERE grp = ? AND k", asked,
                                   (group,)))
    expected = {(k, stored[k]) for k in set(asked) if k in stored and stored[k] == group}
    assert len(got) == len(set(got))  # no row twice, even when a value repeats across chunks
    assert set(got) == expected


def test_rows_in_spans_more_values_than_one_query_may_bind() -> None:
    # SQLite's default bound-parameter limit was 999 before 3.32 (from memory of
    # sqlite.org/limits.html, SQLITE_MAX_VARIABLE_NUMBER); one
    # IN (...) with 5,000 values would fail there, the chunked helper must not.
    conn = _table([(k, 0) for k in range(5000)])
    got = list(storage.rows_in(conn, "SELECT k FROM t WHERE k", range(5000)))
    assert sorted(k for (k,) in got) == list(range(5000))
    assert storage.IN_CHUNK < 999
