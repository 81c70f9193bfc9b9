"""The README's demo command: runs end to end and its claims hold when checked independently."""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

from vault import Conflict, run_demo, verify_audit
from vault.cli import main


@pytest.mark.slow
def test_demo_runs_and_its_claims_hold(tmp_path: Path, capsys) -> None:
    root = tmp_path / "demo"
    summary = run_demo(root, n_participants=24, say=lambda _: None)
    assert summary["identity_leaks"] == 0 and summary["audit_ok"]
    # independent of the demo's own check: no contact detail or name in any vault byte
    with open(root / "study" / "participants.csv") as fh:
        people = list(csv.DictReader(fh))
    needles = [p[k].encode() for p in people for k in ("name", "email", "phone")]
    for path in (root / "vault").rglob("*"):
        if path.is_file():
            data = path.read_bytes()
            assert not any(n in data for n in needles), path
    assert verify_audit(root / "vault", public_key=bytes.fromhex(summary["public_key"])).ok
    # a second run replaces the earlier demo; a foreign folder is refused
    assert main(["demo", "--dir", str(root), "--participants", "24", "--json"]) == 0
    capsys.readouterr()
    foreign = tmp_path / "thesis"
    foreign.mkdir()
    (foreign / "chapter1.tex").write_text("mine")
    with pytest.raises(Conflict):
        run_demo(foreign, say=lambda _: None)
