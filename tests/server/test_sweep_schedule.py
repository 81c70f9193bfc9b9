"""The scheduled sweep: the service erases, on its own schedule and as the steward who started it,
a participant whose consent has ended, with the erasure audited like a sweep run by hand.
(A schedule of 0.0005 h, about 2 s, so the test sees a run; the wait is bounded by the service
staying alive, not a speed check.)"""

from __future__ import annotations

import datetime as dt
import threading
from pathlib import Path

from tests.clock import ManualClock
from tests.conftest import TEST_PASSPHRASE
from tests.server.conftest import form


def test_the_service_sweeps_on_its_schedule(tmp_path: Path, serve) -> None:
    from vault import Vault, describe, verify_audit

    entered = ManualClock(dt.datetime(2026, 5, 1, 9, 0, tzinfo=dt.UTC))  # before that form lapsed
    with Vault.init(tmp_path / "v", TEST_PASSPHRASE, clock=entered) as v:
        expired = v.enrol(form("gone", "consent-expired.toml").encode())["participant_id"]
        kept = v.enrol(form("stays").encode())["participant_id"]
        v.make_served(TEST_PASSPHRASE)
    assert describe(tmp_path / "v")["participants_erased"] == 0
    running = serve(tmp_path / "v", "--sweep-every-hours", "0.0005")
    assert running.start["sweep_every_hours"] == 0.0005
    for _ in range(60000):  # bounded by the process: a dead service fails the assertion below
        if describe(tmp_path / "v")["participants_erased"] == 1:
            break
        assert running.proc.poll() is None, b"".join(running.stderr).decode()
        threading.Event().wait(0.01)
    assert running.stop() == 0
    facts = describe(tmp_path / "v")
    assert facts["participants_erased"] == 1
    with Vault.open(tmp_path / "v", TEST_PASSPHRASE) as v:
        assert not v.readable(expired) and v.readable(kept)
        erasures = [e for e in v.audit_entries() if e["action"].startswith("withdraw.")
                    and e.get("actor") == "steward" and e["decision"] == "done"]
    assert erasures, "the scheduled erasure is not in the audit log"
    assert verify_audit(tmp_path / "v").ok
