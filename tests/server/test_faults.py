"""The live service killed (SIGKILL: no cleanup of any kind) in the middle of an export, a
recording upload and a withdrawal, KILLS times each at randomised points (the seed is printed;
MINDWARD_FAULT_SEED replays a run, MINDWARD_FAULT_KILLS changes the count). After each kill the
service is started again on the same vault (which opens it, recovering what was cut off) and:

- the vault verifies (audit log and every blob), and no file outside the vault's ciphertext was
  left behind by the service (its temporary folder is empty; the recording's bytes appear in no
  file of the vault);
- an export is all-or-nothing: the outbox holds nothing after the restart (the archive endpoint
  serves no run that is not done), every export run is in a final state, and the budget ledger is
  exactly what the exports the lineage records charged, plus the runs voided after their files
  were being written (their charge stands by design, vault/services/export_runs.py: a caller who
  could kill the process and copy the half-written files must not get the budget back);
- an upload is all-or-nothing: the participant has no recording, or the complete one (uploading
  the file again finds it stored);
- a withdrawal is all-or-nothing: processed with a receipt and the participant erased, or still
  pending with no receipt and the participant's key in place (and processing it then succeeds);
- the client saw the failure as a broken connection (the remote client's Unreachable, exit 11)
  and, unpacking into a staging folder, kept no folder where the export was expected.

Kill points are drawn from the time one uninterrupted run of the same call takes (measured once,
only to place the kills; nothing is timed or asserted about time), or, for uploads, from the
chunk of the body being sent."""

from __future__ import annotations

import datetime as dt
import itertools
import json
import os
import random
import shutil
import sqlite3
import threading
import time
from collections import Counter
from collections.abc import Iterator
from fractions import Fraction
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.conftest import TEST_PASSPHRASE
from tests.server.conftest import Lab, Running, build_lab, edf_file, form, start

KILLS = int(os.environ.get("MINDWARD_FAULT_KILLS", "32"))
PURPOSE = "recommender-training"
EPSILON = Fraction(1, 100)
ITEMS = [f"dish-{j:02d}" for j in range(4)]
FINAL_RUN_STATES = {"done", "refunded", "void"}
EXTRA = KILLS + 4  # participants enrolled beyond the lab's cohort, one per upload or withdrawal


def _seed(name: str) -> random.Random:
    value = int(os.environ.get("MINDWARD_FAULT_SEED") or random.SystemRandom().randrange(2**32))
    print(f"{name}: fault seed {value} (MINDWARD_FAULT_SEED={value} replays it)")
    return random.Random(value)


@pytest.fixture
def fault_lab(tmp_path: Path) -> Lab:
    """The service tests' lab, with EXTRA more participants who have ratings and no recording."""
    from vault import Vault

    lab = build_lab(tmp_path / "lab")
    with Vault.open(lab.vault, TEST_PASSPHRASE) as v:
        extra = [v.enrol(form(f"k{i}").encode())["participant_id"] for i in range(EXTRA)]
        ratings = tmp_path / "extra-ratings.csv"
        ratings.write_text("participant_id,item_id,value\n" + "".join(
            f"{p},dish-{j:02d},{(i * j) % 4}\n" for i, p in enumerate(extra) for j in range(4)))
        v.ingest_scores(ratings, "explicit")
        ratings.unlink()
    return Lab(lab.root, lab.vault, lab.tokens, lab.pids + extra)


class Server:
    """The service of one vault, killed and started again; its temporary folder is its own."""

    def __init__(self, lab: Lab, tmp: Path) -> None:
        self.lab = lab
        self.tmp = tmp
        tmp.mkdir(mode=0o700)
        self.last_export: str | None = None  # the export id the client was told, if any
        self.running: Running = self._start()

    def _start(self) -> Running:
        return start(self.lab.vault, env={"TMPDIR": str(self.tmp)})

    def client(self, role: str = "steward") -> httpx.Client:
        return httpx.Client(base_url=self.running.origin, timeout=600,
                            headers={"Authorization": f"Bearer {self.lab.tokens[role]}"})

    def kill_and_restart(self) -> None:
        self.running.kill()
        self.running = self._start()

    def stop(self) -> None:
        if self.running.proc.poll() is None:
            self.running.stop()
        self.running.kill()  # reads its output to the end and closes the pipes

    def check_clean(self) -> None:
        """After a restart: the vault verifies and the service left no file in its temp folder."""
        with self.client() as steward:
            report = steward.post("/v1/verify")
        assert report.status_code == 200 and report.json()["ok"], report.text
        assert not list(self.tmp.iterdir()), f"files left in the service's temp folder: " \
            f"{sorted(p.name for p in self.tmp.iterdir())}"


def _db(vault_path: Path) -> sqlite3.Connection:
    return sqlite3.connect(f"file:{vault_path / 'vault.db'}?mode=ro", uri=True)


def _rows(vault_path: Path, query: str, *args: object) -> list[tuple[Any, ...]]:
    conn = _db(vault_path)
    try:
        return conn.execute(query, args).fetchall()
    finally:
        conn.close()


def _in_background(fn: Any) -> tuple[threading.Thread, dict[str, Any]]:
    """Run fn() in a thread; its result or the exception it raised lands in the dict."""
    outcome: dict[str, Any] = {}

    def run() -> None:
        try:
            outcome["result"] = fn()
        except BaseException as exc:
            outcome["error"] = exc

    thread = threading.Thread(target=run)
    thread.start()
    return thread, outcome


def _finish(server: Server) -> None:
    """The end of a run: the service stopped, the vault opened in this process verifies."""
    from vault import Vault, verify_audit

    server.stop()
    assert verify_audit(server.lab.vault).ok
    with Vault.open(server.lab.vault, TEST_PASSPHRASE) as v:
        assert v.verify()["ok"]


# -- exports ---------------------------------------------------------------------------------------

def _export_and_download(server: Server, out: Path, public_key: bytes, kill: str = "") -> str:
    """What the remote client does: ask for an export, receive the archive into a staging folder
    beside `out`, verify it, and only then rename it to `out`; on any failure no folder is kept.
    `kill` "answered" kills the service once the export is made and before the download,
    "downloading" once the first bytes of the archive are in."""
    from vault import verify_export
    from vault.formats.archive import unpack

    staging = out.with_name(out.name + ".partial")
    with server.client("analyst") as http:
        answer = http.post("/v1/exports/matrix", json={
            "purpose": PURPOSE, "category": "ratings-explicit", "epsilon": float(EPSILON),
            "items": ITEMS})
        assert answer.status_code == 200, answer.text
        server.last_export = answer.json()["export_id"]
        if kill == "answered":
            server.running.proc.kill()
        staging.mkdir()
        try:
            with http.stream("GET", answer.json()["archive"]) as got:
                assert got.status_code == 200, got.read()

                def chunks() -> Iterator[bytes]:
                    for n, chunk in enumerate(got.iter_bytes()):
                        if n == 0 and kill == "downloading":
                            server.running.proc.kill()
                        yield chunk

                unpack(chunks(), staging, max_bytes=1 << 24, max_files=16)
            checked = verify_export(staging, public_key)
            assert checked["ok"], checked
            staging.rename(out)
        finally:
            if staging.exists():
                shutil.rmtree(staging)
    return "complete"


def _check_exports(lab: Lab) -> None:
    """Every run final, nothing in the outbox, the ledger what the recorded exports charged."""
    states = {s for (s,) in _rows(lab.vault, "SELECT state FROM export_runs")}
    assert states <= FINAL_RUN_STATES, states
    assert not any((lab.vault / "outbox").iterdir()), "an export was left in the outbox"
    charged: Counter[str] = Counter(pid for (pid,) in _rows(
        lab.vault, "SELECT pid FROM export_members JOIN exports USING (export_id) "
                   "WHERE purpose = ?", PURPOSE))
    voided = {e for (e,) in _rows(lab.vault, "SELECT export_id FROM export_runs WHERE state = 'void' "
                                             "AND purpose = ?", PURPOSE)}
    for (raw,) in _rows(lab.vault, "SELECT entry FROM audit_log"):  # what each voided run charged
        entry = json.loads(raw)
        if entry.get("action") == "budget.charge" and entry["details"].get("export") in voided:
            charged.update(entry["subjects"])
    ledger = dict(_rows(lab.vault, "SELECT pid, epsilon FROM budget_ledger WHERE purpose = ?",
                        PURPOSE))
    assert {pid: Fraction(e) for pid, e in ledger.items() if Fraction(e)} == {
        pid: n * EPSILON for pid, n in charged.items()}
    assert not _rows(lab.vault, "SELECT * FROM export_charges")  # no charge left staged


@pytest.mark.slow
def test_killed_during_exports(fault_lab: Lab, tmp_path: Path) -> None:
    from vault import describe

    rng = _seed("exports")
    public_key = bytes.fromhex(describe(fault_lab.vault)["public_key"])
    server = Server(fault_lab, tmp_path / "service-tmp")
    outs = (tmp_path / f"export-{n}" for n in itertools.count())
    began = time.monotonic()  # the first export of a freshly started service, as after each kill
    assert _export_and_download(server, next(outs), public_key) == "complete"
    span = time.monotonic() - began  # where to place kills, never asserted
    print(f"exports: one export and download took {span:.3f} s; kills within 1.2 times that")
    seen: Counter[str] = Counter()
    try:
        for _ in range(KILLS):
            out = next(outs)
            server.last_export = None
            kill = rng.choice(["timed", "timed", "answered", "downloading"])
            thread, outcome = _in_background(lambda out=out, kill=kill: _export_and_download(
                server, out, public_key, kill))
            if kill == "timed":
                time.sleep(rng.uniform(0, span * 1.2))
            else:
                thread.join()
            server.kill_and_restart()
            thread.join()
            if "result" in outcome:
                seen["finished before the kill"] += 1
                assert out.is_dir()
            else:
                error = outcome["error"]
                assert isinstance(error, httpx.TransportError), repr(error)  # Unreachable
                assert not out.exists() and not out.with_name(out.name + ".partial").exists()
                seen[f"cut off after the export was made ({kill})" if server.last_export else
                     "cut off before the export was made"] += 1
                if server.last_export:  # never served after the restart
                    with server.client("analyst") as http:
                        assert http.get(f"/v1/exports/{server.last_export}/archive"
                                        ).status_code == 404
            _check_exports(fault_lab)
            server.check_clean()
    finally:
        _finish(server)
    print(f"exports: {KILLS} kills: {dict(seen)}")
    assert sum(seen.values()) == KILLS


# -- uploads ---------------------------------------------------------------------------------------

CHUNK = 16 * 1024


def _body(data: bytes, kill_at: int, server: Server) -> Iterator[bytes]:
    """The recording in chunks; the service is killed just before chunk `kill_at` goes out."""
    for n, start_at in enumerate(range(0, len(data), CHUNK)):
        if n == kill_at:
            server.running.proc.kill()
        yield data[start_at : start_at + CHUNK]


def _window(data: bytes) -> bytes:
    """A stretch of the recording's samples (past its header) to look for on disk."""
    header = int(data[184:192].decode().strip())  # EDF: header bytes at offset 184 (the spec)
    windows = (data[at : at + 64] for at in range(header, len(data) - 64, 64))
    return max(windows, key=lambda w: len(set(w)))  # the most varied: it occurs nowhere by chance


@pytest.mark.slow
def test_killed_during_uploads(fault_lab: Lab, tmp_path: Path) -> None:
    rng = _seed("uploads")
    data = edf_file().read_bytes()
    window = _window(data)
    chunks = -(-len(data) // CHUNK)
    server = Server(fault_lab, tmp_path / "service-tmp")
    fresh = iter(fault_lab.pids[len(fault_lab.pids) - EXTRA:])
    pid = next(fresh)
    began = time.monotonic()
    with server.client() as http:
        assert http.post(f"/v1/ingest/eeg/{pid}", content=data).status_code == 200
    span = time.monotonic() - began
    seen: Counter[str] = Counter()
    try:
        for _ in range(KILLS):
            pid = next(fresh)
            # mid-body, or (chunks) after the whole body went out, while it is being stored
            kill_at = rng.choice([rng.randrange(chunks), chunks])
            headers = {"Content-Type": "application/octet-stream",
                       "Content-Length": str(len(data))}

            def upload(pid: str = pid, kill_at: int = kill_at) -> Any:
                with server.client() as http:
                    return http.post(f"/v1/ingest/eeg/{pid}", headers=headers,
                                     content=_body(data, kill_at, server))

            thread, outcome = _in_background(upload)
            if kill_at == chunks:
                time.sleep(rng.uniform(0, span))
                server.running.proc.kill()
            thread.join()
            server.kill_and_restart()
            stored = _rows(fault_lab.vault, "SELECT count(*) FROM recordings WHERE pid = ?", pid)[0][0]
            assert stored in (0, 1)
            if "result" in outcome and outcome["result"].status_code == 200:
                assert stored == 1
            else:
                assert "error" in outcome or outcome["result"].status_code >= 400
            with server.client() as http:  # the stored recording is the whole file, or none is
                again = http.post(f"/v1/ingest/eeg/{pid}", content=data)
            assert again.status_code == 200, again.text
            assert again.json()["already_stored"] is bool(stored)
            seen["stored before the kill" if stored else "nothing stored (killed mid-body)"
                 if kill_at < chunks else "nothing stored (killed after the body)"] += 1
            server.check_clean()
            for path in fault_lab.vault.rglob("*"):
                if path.is_file():
                    assert window not in path.read_bytes(), f"recording bytes in plain in {path}"
    finally:
        _finish(server)
    print(f"uploads: {KILLS} kills: {dict(sorted(seen.items()))}")
    assert sum(seen.values()) == KILLS


# -- withdrawals -----------------------------------------------------------------------------------

def _withdrawal_state(server: Server, pid: str) -> str:
    with server.client() as http:
        pending = [w["participant_id"] for w in http.get("/v1/withdrawals").json()]
        receipt = http.get(f"/v1/withdrawals/{pid}/receipt")
    key = _rows(server.lab.vault, "SELECT wrapped_key FROM participants WHERE pid = ?", pid)[0][0]
    if pid in pending:
        assert receipt.status_code == 404, receipt.text
        assert key is not None, "pending, yet the participant's key is gone"
        return "pending"
    assert receipt.status_code == 200, f"neither pending nor processed: {receipt.text}"
    assert key is None, "processed, yet the participant's key is still there"
    return "processed"


@pytest.mark.slow
def test_killed_during_withdrawals(fault_lab: Lab, tmp_path: Path) -> None:
    rng = _seed("withdrawals")
    server = Server(fault_lab, tmp_path / "service-tmp")
    fresh = iter(fault_lab.pids[len(fault_lab.pids) - EXTRA:])
    today = dt.datetime.now(dt.UTC).date().isoformat()

    def request(pid: str) -> None:
        with server.client() as http:
            asked = http.post("/v1/withdrawals", json={"participant": pid, "received": today})
        assert asked.status_code == 200, asked.text

    def process(pid: str) -> httpx.Response:
        with server.client() as http:
            return http.post(f"/v1/withdrawals/{pid}/process")

    pid = next(fresh)
    request(pid)
    began = time.monotonic()
    assert process(pid).status_code == 200
    span = time.monotonic() - began
    seen: Counter[str] = Counter()
    try:
        for _ in range(KILLS):
            pid = next(fresh)
            request(pid)
            thread, outcome = _in_background(lambda pid=pid: process(pid))
            time.sleep(rng.uniform(0, span * 1.3))
            server.kill_and_restart()
            thread.join()
            state = _withdrawal_state(server, pid)
            if "result" in outcome and outcome["result"].status_code == 200:
                assert state == "processed"
            else:
                assert isinstance(outcome.get("error"), httpx.TransportError), outcome
            seen[state] += 1
            if state == "pending":  # the request survived whole: it can be processed now
                assert process(pid).status_code == 200
                assert _withdrawal_state(server, pid) == "processed"
            server.check_clean()
    finally:
        _finish(server)
    print(f"withdrawals: {KILLS} kills: {dict(seen)}")
    assert sum(seen.values()) == KILLS
