"""Load on the live service: 16 concurrent clients (threads, one httpx client each), a fixed
number of requests per client (count-bounded, never timed), mixing access checks, small matrix
exports (each archive downloaded, unpacked and checked with vault.verify_export and the vault's
public key read from its files, not from the service) and audit reads.

Zero errors: every answer is a success, except an export told that every slot is busy (503 with
Retry-After, exit 10), which the client retries and the test counts. Afterwards the service's
`audit verify` is clean and the budget ledger is exactly what the exports' manifests say: per
participant, the sum of the epsilon of the exports that included them (lineage) is the epsilon the
steward's budget endpoint reports, and their release count is the number of those exports."""

from __future__ import annotations

import json
import random
import sqlite3
import tempfile
import threading
import time
from fractions import Fraction
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.conftest import TEST_PASSPHRASE
from tests.server.conftest import Lab, build_lab, error_of

CLIENTS = 16
REQUESTS_EACH = 15  # a third of them exports
EPSILON = "0.01"  # small enough that 16 x 3 exports stay far inside the purpose's budget
PURPOSE = "recommender-training"
ITEMS = [f"dish-{j:02d}" for j in range(4)]
RETRIES = 2000  # a busy export is asked again at most this often (a liveness guard)


def _export(http: httpx.Client, public_key: bytes, counts: dict[str, int], lock: threading.Lock,
            made: list[dict[str, Any]]) -> None:
    from vault import verify_export
    from vault.formats.archive import unpack

    pause = random.Random()
    for _ in range(RETRIES):
        answer = http.post("/v1/exports/matrix", json={
            "purpose": PURPOSE, "category": "ratings-explicit", "epsilon": float(EPSILON),
            "items": ITEMS})
        if answer.status_code != 503:
            break
        assert error_of(answer)["exit_code"] == 10 and answer.headers["Retry-After"]
        with lock:
            counts["busy"] += 1
        time.sleep(pause.uniform(0.02, 0.2))  # back off (shorter than Retry-After: a test)
    assert answer.status_code == 200, answer.text
    result = answer.json()
    with tempfile.TemporaryDirectory(prefix="mindward-load-") as folder:
        with http.stream("GET", result["archive"]) as got:
            assert got.status_code == 200, got.read()
            unpack(got.iter_bytes(), folder, max_bytes=1 << 24, max_files=16)
        checked = verify_export(Path(folder), public_key)
        assert checked["ok"], checked
        assert checked["export_id"] == result["export_id"]
        manifest = json.loads((Path(folder) / "manifest.json").read_text())["body"]
    with lock:
        made.append(manifest)
        counts["exports"] += 1


def _client_run(origin: str, token: str, seed: int, public_key: bytes, counts: dict[str, int],
                lock: threading.Lock, made: list[dict[str, Any]], failures: list[str]) -> None:
    kinds = ["export", "check", "audit"] * (REQUESTS_EACH // 3)
    random.Random(seed).shuffle(kinds)
    try:
        with httpx.Client(base_url=origin, headers={"Authorization": f"Bearer {token}"},
                          timeout=600) as http:
            for kind in kinds:
                if kind == "export":
                    _export(http, public_key, counts, lock, made)
                elif kind == "check":
                    answer = http.post("/v1/access/check", json={
                        "purpose": PURPOSE, "categories": ["ratings-explicit"]})
                    assert answer.status_code == 200, answer.text
                    assert answer.json(), answer.text
                elif seed % 2:  # the analyst reads the signed head
                    answer = http.get("/v1/audit/head")
                    assert answer.status_code == 200, answer.text
                    assert answer.json()["tree_size"] > 0
                else:  # the steward reads the log itself
                    answer = http.get("/v1/audit/entries", params={"limit": 20})
                    assert answer.status_code == 200, answer.text
                    assert len(answer.json()) == 20
                with lock:
                    counts[kind] += 1
    except BaseException as exc:  # reported by the main thread
        failures.append(f"client {seed}: {type(exc).__name__}: {exc}")


def _lineage(vault_path: Path) -> dict[str, set[str]]:
    """export id -> the participants it included (the vault's lineage table, read-only)."""
    conn = sqlite3.connect(f"file:{vault_path / 'vault.db'}?mode=ro", uri=True)
    try:
        out: dict[str, set[str]] = {}
        for export_id, pid in conn.execute("SELECT export_id, pid FROM export_members"):
            out.setdefault(export_id, set()).add(pid)
        return out
    finally:
        conn.close()


@pytest.fixture(scope="module")
def load_lab(tmp_path_factory: pytest.TempPathFactory) -> Lab:
    return build_lab(tmp_path_factory.mktemp("loaded"))


@pytest.mark.slow
def test_sixteen_clients_at_once(load_lab: Lab, serve) -> None:
    from vault import Vault, describe, verify_audit

    public_key = bytes.fromhex(describe(load_lab.vault)["public_key"])
    running = serve(load_lab.vault)
    # half the clients are the analyst, half the steward (an archive is for its maker only)
    tokens = [load_lab.tokens["analyst" if n % 2 else "steward"] for n in range(CLIENTS)]
    counts = {"export": 0, "check": 0, "audit": 0, "exports": 0, "busy": 0}
    lock = threading.Lock()
    made: list[dict[str, Any]] = []
    failures: list[str] = []
    threads = [threading.Thread(target=_client_run, args=(
        running.origin, tokens[n], n, public_key, counts, lock, made, failures))
        for n in range(CLIENTS)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    print(f"load: {CLIENTS} clients, {counts['export'] + counts['check'] + counts['audit']} "
          f"requests ({counts['exports']} exports, {counts['check']} access checks, "
          f"{counts['audit']} audit reads), {counts['busy']} busy answers retried")
    assert not failures, failures
    assert counts["exports"] == CLIENTS * REQUESTS_EACH // 3 == len(made)

    with httpx.Client(base_url=running.origin, timeout=600,
                      headers={"Authorization": f"Bearer {load_lab.tokens['steward']}"}) as steward:
        report = steward.get("/v1/audit/verify")
        assert report.status_code == 200 and report.json()["ok"], report.text
        ledger = steward.get("/v1/budget", params={"purpose": PURPOSE}).json()
    assert running.stop() == 0

    lineage = _lineage(load_lab.vault)
    expected: dict[str, Fraction] = {}
    releases: dict[str, int] = {}
    for manifest in made:
        assert manifest["budget"]["charged_purposes"] == [PURPOSE]
        members = lineage[manifest["export_id"]]
        assert len(members) == manifest["cohort_size"]
        for pid in members:
            expected[pid] = expected.get(pid, Fraction(0)) + Fraction(manifest["epsilon"])
            releases[pid] = releases.get(pid, 0) + 1
    (row,) = ledger
    spent = {p["participant_id"]: Fraction(p["epsilon"]) for p in row["by_participant"]}
    assert spent == expected
    assert {p["participant_id"]: p["releases"] for p in row["by_participant"]} == releases
    assert sum(expected.values()) == Fraction(EPSILON) * sum(m["cohort_size"] for m in made)
    assert verify_audit(load_lab.vault).ok
    with Vault.open(load_lab.vault, TEST_PASSPHRASE) as v:
        assert v.verify()["ok"]
    assert not any((load_lab.vault / "outbox").iterdir())  # every archive downloaded and removed
