"""The README's demo command: runs end to end, and its claims hold when checked independently."""

from __future__ import annotations

import csv
import datetime as dt
import json
from pathlib import Path

import pandas as pd
import pytest

from vault import Conflict, verify_audit, verify_export, verify_receipt_file
from vault.cli.app import main
from vault.cli.demo import run_demo


@pytest.mark.slow
def test_demo_runs_and_its_claims_hold(tmp_path: Path, capsys) -> None:
    root = tmp_path / "demo"
    summary = run_demo(root, n_participants=30, say=lambda _: None)
    key = bytes.fromhex(summary["public_key"])
    paths = {k: Path(v) for k, v in summary["paths"].items()}
    # no contact detail or name in any vault byte (independent of the demo's own check)
    with open(paths["study"] / "participants.csv") as fh:
        people = list(csv.DictReader(fh))
    needles = [p[k].encode() for p in people for k in ("name", "email", "phone")]
    for path in paths["vault"].rglob("*"):
        if path.is_file():
            data = path.read_bytes()
            assert not any(n in data for n in needles), path
    # the export holds exactly the participants whose plan grants recommender training and
    # whose consent had not expired (read from study.json, not from the vault)
    study = json.loads((paths["study"] / "study.json").read_text())
    today = dt.datetime.now(dt.UTC).date()
    expected = sum(1 for plan in study["consent_plan"] if plan["grants"]["recommender-training"]
                   and dt.date.fromisoformat(plan["expires"]) > today)
    rows = pd.read_parquet(paths["export"] / "matrix.parquet")
    assert len(rows) == expected == summary["export_cohort"]
    assert verify_export(paths["export"], key)["ok"]
    ok, problems = verify_receipt_file(paths["receipt"], key)
    assert ok, problems
    assert summary["export_flagged_for_recall"] and not summary["withdrawn_data_readable"]
    assert summary["identity_leaks"] == 0
    assert verify_audit(paths["vault"], public_key=key).ok
    assert paths["plot"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # a second run replaces the earlier demo; a foreign folder is refused
    assert main(["demo", "--dir", str(root), "--participants", "30", "--json"]) == 0
    capsys.readouterr()
    foreign = tmp_path / "thesis"
    foreign.mkdir()
    (foreign / "chapter1.tex").write_text("mine")
    with pytest.raises(Conflict):
        run_demo(foreign, say=lambda _: None)
