"""The steward-only Vault methods called by an analyst through the library, not the CLI: each
is refused before it does anything, and the refusal is in the audit log under the analyst's name.
(tests/cli/test_role_matrix.py walks the same through the commands.)"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from tests.clock import ManualClock
from tests.conftest import ROOT, TEST_PASSPHRASE
from vault import PolicyRefusal, Vault

NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
ANALYST = "analyst passphrase long enough"
FORM = (ROOT / "docs" / "examples" / "consent-all-granted.toml").read_bytes()

# method, arguments, the action its refusal is audited as
CALLS = [
    ("add_member", ("mallory", "steward", "mallory passphrase long"), "member.add"),
    ("remove_member", ("steward",), "member.remove"),
    ("apply_policy", (ROOT / "policies",), "policy.apply"),
    # a folder that does not exist: refused for the role first, so the analyst learns nothing
    ("apply_policy", (ROOT / "no-such-policy-folder",), "policy.apply"),
    ("rekey", ("a passphrase of my own choosing",), "vault.rekey"),
    ("enrol", (FORM.replace(b'code = "TL-', b'code = "zz-', 1),), "participant.enrol"),
    ("amend_consent", ("{pid}", FORM), "consent.amend"),
    ("consent_history", ("{pid}",), "consent.show"),
    ("new_participant", (), "participant.create"),
    ("put_blob", ("{pid}", "eeg-raw", [b"planted"]), "blob.store"),
    ("blobs", (), "blobs.list"),
    ("readable", ("{pid}",), "participant.readable"),
    ("export_members", ("x",), "export.members"),
    ("verify", (), "vault.verify"),
    ("sign_head", (), "audit.head"),
]


@pytest.fixture
def lab(vault_path: Path):
    clock = ManualClock(NOW)
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=clock) as v:
        pid = v.enrol(FORM)["participant_id"]
        v.add_member("omar", "analyst", ANALYST)
    return vault_path, clock, pid


def _state(v: Vault) -> dict[str, object]:
    return {"members": v.members(), "policy": v.policy.version, "blobs": v.blobs(),
            "participants": v.info()["participants"]}


@pytest.mark.parametrize(("method", "args", "action"), CALLS,
                         ids=[f"{m}-{i}" for i, (m, _, _) in enumerate(CALLS)])
def test_an_analyst_is_refused_audited_and_changes_nothing(lab, method, args, action) -> None:
    path, clock, pid = lab
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:
        before = _state(v)
    args = tuple(a.format(pid=pid) if isinstance(a, str) else a for a in args)
    with Vault.open(path, ANALYST, member="omar", clock=clock) as a:
        size = a._audit.size
        with pytest.raises(PolicyRefusal, match="stewards only"):
            getattr(a, method)(*args)
        (entry,) = a._audit.entries(size)
    assert (entry["actor"], entry["action"], entry["decision"]) == ("omar", action, "refuse")
    assert entry["reasons"] == ["role-not-allowed"]
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:  # the steward's key still opens
        assert _state(v) == before
    with Vault.open(path, ANALYST, member="omar", clock=clock) as a:  # and the analyst's too
        assert a.role == "analyst"


def test_blob_details_cannot_rewrite_what_the_audit_entry_names(lab) -> None:
    # a caller's details overwrote the stored blob's id and kind in its audit entry
    path, clock, pid = lab
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:
        info = v.put_blob(pid, "eeg-raw", [b"signal"],
                          details={"blob": "0" * 32, "kind": "nothing", "note": "kept"})
        entry = v.audit_entries()[-1]  # the read itself is logged after it
    assert entry["action"] == "blob.store"
    assert entry["details"] == {"blob": info.blob_id, "kind": "eeg-raw", "note": "kept"}
