"""SIGKILL during `export matrix`, `export matrix --release aggregate` and `export eeg`, at random
steps and at every change of the run's state: after the next open no folder looks complete
without a manifest, no staging folder is left, and the budget is either charged with a finished
export, refunded (nothing had been written), or charged with the release withdrawn (files had
been written, so they may have been read); the audit log says which.

Outside sources: the manifest is checked by `verify_export_dir` with the vault's public key
(RFC 8032 signatures, SHA-256 of every file) and the audit log by `verify_audit` (RFC 9162).
"""

from __future__ import annotations

import json
import os
import random
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from tests.clock import ManualClock
from tests.conftest import ROOT, TEST_PASSPHRASE
from tests.export_killer import NOW, PURPOSE
from tests.services.test_export_eeg import SOURCE
from tests.services.test_export_holes import T0, form
from tests.services.test_export_matrix import make_policy
from vault import Vault, verify_audit
from vault.services.export_matrix import verify_export_dir
from vault.services.export_runs import STAGING_MARK

RANDOM_KILLS = 5
CHARGE = {"matrix": ("1/10", "0", 1), "aggregate": ("1/5", "0", 1)}  # aggregate: replace-one


@pytest.fixture(scope="module")
def pristine(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("pristine")
    clock = ManualClock(T0)
    with Vault.init(root / "vault", TEST_PASSPHRASE, policy_dir=make_policy(root),
                    clock=clock) as v:
        pids = [v.enrol(form(f"k{i}"))["participant_id"] for i in range(5)]
        for pid in pids:
            v.ingest_eeg(pid, SOURCE)
        csv = root / "ratings.csv"
        csv.write_text("participant_id,item_id,value\n" + "".join(
            f"{pid},dish-{j:02d},{(i + j) % 4}\n" for i, pid in enumerate(pids) for j in range(6)))
        v.ingest_scores(csv, "explicit")
    return root / "vault"


def _child(vault: Path, kind: str, out: Path, mode: str, n: int) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "tests.export_killer", str(vault), kind, str(out), mode, str(n)],
        cwd=ROOT, capture_output=True, env={**os.environ, "PYTHONPATH": str(ROOT)}, check=False)


def _spent(v: Vault) -> dict[str, tuple[str, str, int]]:
    rows = v._conn.execute("SELECT pid, epsilon, rho, releases FROM budget_ledger WHERE purpose = ?",
                           (PURPOSE["matrix"],))
    return {pid: (e, r, k) for pid, e, r, k in rows}


def _check(run: Path, kind: str) -> str:
    """The state after the next open; returns what happened to the export."""
    out = run / "export"
    with Vault.open(run / "vault", TEST_PASSPHRASE, clock=ManualClock(NOW)) as v:
        assert v.verify()["ok"]
        assert not list((run / "vault" / "tmp").iterdir())
        assert not [p.name for p in run.iterdir() if STAGING_MARK in p.name], "staging debris"
        runs = v._conn.execute("SELECT export_id, state FROM export_runs").fetchall()
        assert len(runs) <= 1 and all(state in ("done", "refunded", "void") for _, state in runs)
        lineage = v._conn.execute("SELECT COUNT(*) FROM exports").fetchone()[0]
        settled = {e["details"]["export"]: e["details"]["outcome"] for e in v.audit_entries()
                   if e["action"] == "export.settle"}
        refunds = [e for e in v.audit_entries() if e["action"] == "budget.refund"]
        spent = _spent(v)
        charged = CHARGE.get(kind)
        if out.exists():  # an export folder: complete, signed, recorded, charged
            assert (out / "manifest.json").is_file(), "a folder that looks complete, no manifest"
            assert verify_export_dir(out, v.public_key)["ok"]
            assert runs[0][1] == "done" and lineage == 1
            assert charged is None or set(spent.values()) == {charged}
            outcome = "finished" if settled.get(runs[0][0]) == "finished" else "complete"
            assert runs[0][0] not in settled or settled[runs[0][0]] == "finished"
        elif not runs:  # killed before the run was recorded: nothing charged, nothing written
            assert lineage == 0 and not spent and not settled
            outcome = "not-started"
        else:
            export_id, state = runs[0]
            assert lineage == 0
            if charged is None:  # no budget (EEG): the staging folder is simply removed
                assert state == "void" and settled == {export_id: "removed"}
                outcome = "removed"
            elif state == "refunded":  # nothing had been written: the charge is credited back
                assert settled == {export_id: "refunded"} and not spent
                assert refunds
                outcome = "refunded"
            else:  # files had been written (and could have been read): the charge stands
                assert state == "void" and settled == {export_id: "charged-not-released"}
                assert set(spent.values()) == {charged}
                outcome = "charged-not-released"
        before = v._audit.size
    with Vault.open(run / "vault", TEST_PASSPHRASE, clock=ManualClock(NOW)) as again:
        assert again._audit.size == before  # recovery is done once: the next open changes nothing
    assert verify_audit(run / "vault").ok
    return outcome


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["matrix", "aggregate", "eeg"])
def test_sigkill_during_an_export_leaves_it_finished_or_undone(pristine: Path, tmp_path: Path,
                                                               kind: str) -> None:
    counting = tmp_path / "count"
    shutil.copytree(pristine, counting / "vault")
    done = _child(counting / "vault", kind, counting / "export", "count", 0)
    assert done.returncode == 0, done.stderr.decode()[-2000:]
    plan = json.loads(done.stdout.decode().strip().splitlines()[-1])
    marks = plan["marks"]
    assert set(marks) == {"staged", "writing", "signed", "settled"}, marks
    assert _check(counting, kind) == "complete"
    rng = random.Random(f"export-kill-{kind}")
    # around every change of state, plus random steps anywhere in the run
    chosen = {m + d for m in marks.values() for d in (0, 1, 2)}
    chosen = {n for n in chosen if 1 <= n <= plan["steps"]}
    chosen |= set(rng.sample(range(1, plan["steps"] + 1), RANDOM_KILLS))
    outcomes = {}
    for n in sorted(chosen):
        run = tmp_path / f"kill-{n}"
        shutil.copytree(pristine, run / "vault")
        result = _child(run / "vault", kind, run / "export", "step", n)
        assert result.returncode == -9, (n, result.stderr.decode()[-2000:])
        outcomes[n] = _check(run, kind)
        shutil.rmtree(run)
    seen = set(outcomes.values())
    expected = {"removed", "finished"} if kind == "eeg" else {"refunded", "charged-not-released",
                                                              "finished"}
    assert expected <= seen, outcomes
