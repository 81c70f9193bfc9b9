"""SIGKILL at random points of writing: the vault always opens, verifies, holds whole blobs,
and a signed head covers every audit row (none left for the next open to flag)."""

from __future__ import annotations

import json
import os
import random
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.conftest import ROOT, TEST_PASSPHRASE
from vault import Vault, verify_audit

RUNS = 52


def _kill_after(path: Path, seed: int, delay: float) -> None:
    with subprocess.Popen(
        [sys.executable, "-m", "tests.crash_writer", str(path), str(seed)],
        cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
    ) as child:
        assert child.stdout is not None and child.stderr is not None
        line = child.stdout.readline()
        assert line.strip() == b"ready", child.stderr.read()
        time.sleep(delay)
        child.send_signal(signal.SIGKILL)
        child.wait()


def _no_uncovered_rows(path: Path) -> None:
    """Before any open: the killed writer's last commit left a signed head over every row."""
    report = verify_audit(path)
    assert report.ok and not report.unauthenticated, report.problem
    conn = sqlite3.connect(f"file:{path / 'vault.db'}?mode=ro", uri=True)
    try:
        rows = conn.execute("SELECT COUNT(*) FROM audit_log").fetchone()[0]
        head = json.loads(conn.execute(
            "SELECT value FROM meta WHERE key = 'audit_head'").fetchone()[0])
    finally:
        conn.close()
    assert head["tree_size"] == rows


def _check(path: Path) -> int:
    _no_uncovered_rows(path)
    with Vault.open(path, TEST_PASSPHRASE) as v:
        assert v.audit_flagged is None
        result = v.verify()
        assert result["ok"], result
        rows = {b["blob_id"]: b for b in v.blobs()}
        files = {p.name[: -len(".mwb")] for p in (path / "blobs").rglob("*.mwb")}
        assert files == set(rows), "every blob file has a row and every row a file"
        assert not list((path / "tmp").iterdir())
        for blob_id, row in rows.items():
            key = v._door._ring.participant_key(v._conn, row["pid"])
            assert sum(len(c) for c in v._door._blobs._decrypt(key, row["pid"], blob_id)) == row["plain_size"]
    assert verify_audit(path).ok
    return len(rows)


@pytest.mark.slow
def test_sigkill_while_writing_never_leaves_a_partial_blob(tmp_path: Path) -> None:
    path = tmp_path / "vault"
    Vault.init(path, TEST_PASSPHRASE).close()
    rng = random.Random(20261202)
    counts = []
    for run in range(RUNS):
        _kill_after(path, run, rng.uniform(0.0, 0.25))
        counts.append(_check(path))
    assert counts[-1] > 0, "the writer never got a blob in: the test would prove nothing"
