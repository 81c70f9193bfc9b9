"""`mindward report`: a record of processing that holds counts, never ids or identities."""

from __future__ import annotations

import datetime as dt
import json

from tests.clock import at
from tests.conftest import ROOT
from vault import Vault
from vault.cli.render import report_markdown as to_markdown

EXAMPLES = ROOT / "docs" / "examples"
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
ENTERED = dt.datetime(2026, 5, 1, 9, 0, tzinfo=dt.UTC)  # before the expired form lapsed: it can be entered


def test_record_counts_consent_and_names_nobody(fresh_vault: Vault) -> None:
    pids = []
    for name in ("all-granted", "no-recommender", "expired", "no-external"):
        when = ENTERED if name == "expired" else NOW
        pids.append(at(fresh_vault, when).enrol((EXAMPLES / f"consent-{name}.toml").read_bytes())
                    ["participant_id"])
    record = at(fresh_vault, NOW).report()
    purposes = {p["purpose"]: p for p in record["purposes"]}
    # hand-counted from the four example forms (docs/examples/README.md)
    assert purposes["recommender-training"]["participants_with_consent_now"] == 2
    assert purposes["recommender-training/canteen-menu"]["participants_with_consent_now"] == 2
    assert purposes["external-sharing"]["participants_with_consent_now"] == 2
    assert record["participants"] == {"enrolled": 4, "active": 4, "erased": 0, "consent_expired": 1}
    text = json.dumps(record) + to_markdown(record)
    assert not any(pid in text for pid in pids)
    for name in ("Maren Ashcombe", "TL-001", "@"):
        assert name not in text
    assert "not legal advice" in to_markdown(record)
