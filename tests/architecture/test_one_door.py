"""Enrolment, consent and the one door: no byte of participant data without a live grant."""

from __future__ import annotations

import copy
import datetime as dt
import hashlib
import pickle
from pathlib import Path

import pytest

from tests.clock import ManualClock, at
from tests.conftest import ROOT, TEST_PASSPHRASE, assert_absent, files_of
from vault import AuthenticationFailed, Conflict, InvalidInput, PolicyRefusal, Vault, read_audit_log
from vault.policy.engine import Admission, Grant

EXAMPLES = ROOT / "docs" / "examples"
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
ENTERED = dt.datetime(2026, 5, 1, 9, 0, tzinfo=dt.UTC)  # before the expired form lapsed: it can be entered


def form(name: str, code: str) -> bytes:
    """An example form (docs/examples) re-coded as another invented participant."""
    text = (EXAMPLES / name).read_text()
    return text.replace('code = "TL-', f'code = "{code}-', 1).encode()


def _enrol_cohort(v: Vault, n_all: int, n_no_rec: int = 0, n_expired: int = 0) -> dict[str, list[str]]:
    groups: dict[str, list[str]] = {"all": [], "no-rec": [], "expired": []}
    plan = [("all", "consent-all-granted.toml", n_all), ("no-rec", "consent-no-recommender.toml", n_no_rec),
            ("expired", "consent-expired.toml", n_expired)]
    for group, name, n in plan:
        for i in range(n):
            when = ENTERED if group == "expired" else NOW
            groups[group].append(at(v, when).enrol(form(name, f"{group}{i}"))["participant_id"])
    return groups


def _snapshot(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in files_of(root) if p.name != "lock" and not p.name.endswith("-shm")}  # shm: a read index


@pytest.fixture
def cohort(fresh_vault: Vault) -> tuple[Vault, dict[str, list[str]], dict[str, str]]:
    groups = _enrol_cohort(fresh_vault, 6, 2, 1)
    blobs = {pid: at(fresh_vault, NOW).put_blob(pid, "eeg-raw", [f"EEG-OF-{pid}".encode() * 100]).blob_id
             for pids in groups.values() for pid in pids}
    return fresh_vault, groups, blobs


def test_granted_reads_return_the_data_and_are_audited(cohort) -> None:
    v, groups, blobs = cohort
    grant = at(v, NOW).authorize("primary-analysis", ["eeg-raw"])
    assert grant.participants == set(groups["all"] + groups["no-rec"])
    pid = groups["all"][0]
    assert b"".join(at(v, NOW).read_blob(grant, blobs[pid])) == f"EEG-OF-{pid}".encode() * 100
    actions = [(e["action"], e.get("decision")) for e in v.audit_entries()]
    assert ("access.grant", "permit") in actions and ("access.read", "permit") in actions


def test_reads_outside_the_grant_are_refused_and_audited(cohort) -> None:
    v, groups, blobs = cohort
    grant = at(v, NOW).authorize("primary-analysis", ["eeg-raw"])
    expired = groups["expired"][0]
    with pytest.raises(PolicyRefusal, match="participant-not-in-grant"):
        at(v, NOW).read_blob(grant, blobs[expired])
    identity = v.blobs(groups["all"][0])
    identity_blob = next(b["blob_id"] for b in identity if b["kind"] == "identity-contact")
    with pytest.raises(PolicyRefusal, match="category-not-in-grant"):
        at(v, NOW).read_blob(grant, identity_blob)
    with pytest.raises(PolicyRefusal, match="grant-expired"):
        at(v, NOW + dt.timedelta(hours=1)).read_blob(grant, blobs[groups["all"][0]])
    refusals = [e for e in v.audit_entries() if e["action"] == "access.read" and e["decision"] == "refuse"]
    assert {tuple(e["reasons"]) for e in refusals} == {
        ("participant-not-in-grant",), ("category-not-in-grant",), ("grant-expired",)}


def test_withdrawal_takes_effect_at_the_door_even_for_an_earlier_grant(cohort) -> None:
    v, groups, blobs = cohort
    pid = groups["all"][0]
    grant = at(v, NOW).authorize("primary-analysis", ["eeg-raw"])
    assert pid in grant.participants
    later = NOW + dt.timedelta(minutes=5)
    text = form("consent-all-granted.toml", "all0").decode()
    old = 'granted = ["eeg-raw", "scores-derived", "ratings-explicit", "demographics"]'
    assert text.index(old) > text.index("[purposes.primary-analysis]")  # first: primary analysis
    withdrawn = text.replace(old, 'granted = []\nrefused = ["eeg-raw", "scores-derived", '
                             '"ratings-explicit", "demographics"]', 1).replace("explicit = true", "", 1)
    at(v, later).amend_consent(pid, withdrawn.encode())
    with pytest.raises(PolicyRefusal, match="consent-withdrawn"):
        at(v, later).read_blob(grant, blobs[pid])
    other = groups["all"][1]
    assert b"".join(at(v, later).read_blob(grant, blobs[other])).startswith(b"EEG-OF-")


def _withdrawn_form(code: str) -> bytes:
    text = form("consent-all-granted.toml", code).decode()
    old = 'granted = ["eeg-raw", "scores-derived", "ratings-explicit", "demographics"]'
    return text.replace(old, 'granted = []\nrefused = ["eeg-raw", "scores-derived", '
                        '"ratings-explicit", "demographics"]', 1).replace("explicit = true", "", 1).encode()


def _counting_loads(v: Vault) -> list[int]:
    calls: list[int] = []
    load = v._engine._consents
    v._engine._consents = lambda pids: calls.append(1) or load(pids)
    return calls


def test_every_read_decides_again_even_at_the_grants_own_instant(cohort) -> None:
    # there is no shortcut: a withdrawal recorded at the very instant of the grant bites
    v, groups, blobs = cohort
    pid, other = groups["all"][:2]
    grant = at(v, NOW).authorize("primary-analysis", ["eeg-raw"])
    loads = _counting_loads(v)
    assert b"".join(at(v, NOW).read_blob(grant, blobs[other])).startswith(b"EEG-OF-")
    assert loads == [1]  # the read loaded consent and decided, at the grant's own instant
    at(v, NOW).amend_consent(pid, _withdrawn_form("all0"))
    with pytest.raises(PolicyRefusal, match="consent-withdrawn"):
        at(v, NOW).read_blob(grant, blobs[pid])


def test_no_grant_no_data(cohort) -> None:
    v, groups, blobs = cohort
    pid = groups["all"][0]
    key = v._door._ring.participant_key(v._conn, pid)
    for fake in (None, object(), "grant", {"purpose": "primary-analysis"}):
        with pytest.raises(PolicyRefusal):
            at(v, NOW).read_blob(fake, blobs[pid])  # type: ignore[arg-type]
        with pytest.raises(PolicyRefusal):
            v._door._blobs.plaintext(fake, key, pid, blobs[pid], "eeg-raw")  # type: ignore[arg-type]
    with pytest.raises(PolicyRefusal, match="only by the policy engine"):
        Grant(object(), engine=v._engine, grant_id="g-forged")
    with pytest.raises(PolicyRefusal, match="only by the policy engine"):
        Admission(object(), None, frozenset({(pid, "eeg-raw")}))  # type: ignore[arg-type]
    grant = at(v, NOW).authorize("primary-analysis", ["eeg-raw"])
    for clone in (pickle.dumps, copy.copy, copy.deepcopy):
        with pytest.raises(TypeError):
            clone(grant)


def test_a_grant_from_another_vault_is_not_valid_here(cohort, tmp_path: Path) -> None:
    v, groups, blobs = cohort
    with Vault.init(tmp_path / "other", TEST_PASSPHRASE) as other:
        _enrol_cohort(other, 6)
        foreign = at(other, NOW).authorize("primary-analysis", ["eeg-raw"])
        with pytest.raises(PolicyRefusal):
            at(v, NOW).read_blob(foreign, blobs[groups["all"][0]])


def test_refusals_are_counted_not_named_and_cohort_minimum_holds(cohort) -> None:
    v, groups, _ = cohort
    with pytest.raises(PolicyRefusal) as err:
        at(v, NOW).authorize("recommender-training", ["scores-derived"])  # minimum cohort 20
    message = str(err.value)
    assert "cohort-too-small" in message and "consent-refused: 2" in message
    assert not any(pid in message for pids in groups.values() for pid in pids)
    entries = [e for e in v.audit_entries() if e["action"] == "access.grant"]
    refused = [e for e in entries if e["decision"] == "refuse"]
    assert refused and sum(len(e["subjects"]) for e in refused) == 9


def test_auditor_and_analyst_roles(cohort, vault_path: Path) -> None:
    v, groups, blobs = cohort
    at(v, NOW).add_member("ines", "auditor", "auditor passphrase long enough")
    at(v, NOW).add_member("omar", "analyst", "analyst passphrase long enough")
    v.close()
    with pytest.raises(PolicyRefusal, match="holds no key to participant data"):
        Vault.open(vault_path, "auditor passphrase long enough", member="ines")
    with Vault.open(vault_path, "analyst passphrase long enough", member="omar",
                    clock=ManualClock(NOW)) as analyst:
        grant = analyst.authorize("primary-analysis", ["eeg-raw"])
        pid = groups["all"][1]
        assert b"".join(analyst.read_blob(grant, blobs[pid])).startswith(b"EEG-OF-")
    with Vault.open(vault_path, TEST_PASSPHRASE) as steward:
        at(steward, NOW).remove_member("omar")
        with pytest.raises(Conflict, match="last steward"):
            at(steward, NOW).remove_member("steward")
    with pytest.raises(AuthenticationFailed):
        Vault.open(vault_path, "analyst passphrase long enough", member="omar")
    assert read_audit_log(vault_path, "auditor passphrase long enough", member="ines")


def test_identity_goes_only_into_ciphertext(vault_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        at(v, NOW).enrol((EXAMPLES / "consent-all-granted.toml").read_bytes())
        assert_absent(vault_path, b"Maren Ashcombe", b"maren.ashcombe", b"900001", b"TL-001")
    assert_absent(vault_path, b"Maren Ashcombe", b"maren.ashcombe", b"900001", b"TL-001")


def test_duplicate_and_mismatched_forms(fresh_vault: Vault) -> None:
    first = at(fresh_vault, NOW).enrol(form("consent-all-granted.toml", "dup"))["participant_id"]
    with pytest.raises(Conflict):
        at(fresh_vault, NOW).enrol(form("consent-all-granted.toml", "dup"))
    with pytest.raises(InvalidInput, match=r"participant\.code"):
        at(fresh_vault, NOW).amend_consent(first, form("consent-no-external.toml", "someone-else"))


@pytest.mark.parametrize("mutation", [
    ('granted = ["eeg-raw", "scores-derived", "ratings-explicit", "demographics"]', 'granted = ["eeg-rwa"]'),
    ("signed = 2026-03-02", "signed = 2031-04-01"),
    ("signed = 2026-03-02\n", ""),
    ("[purposes.primary-analysis]", "[purposes.mind-reading]"),
    ('form_version = "NSL-2026-DISH/1"', 'form_version = "NSL-1999/9"'),
    ("expires = 2031-03-02", "expires = 2025-01-01"),
])
def test_malformed_forms_change_nothing(vault_path: Path, mutation: tuple[str, str]) -> None:
    Vault.init(vault_path, TEST_PASSPHRASE).close()
    good = (EXAMPLES / "consent-all-granted.toml").read_text()
    assert mutation[0] in good
    before = _snapshot(vault_path)
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        with pytest.raises(InvalidInput) as err:
            at(v, NOW).enrol(good.replace(mutation[0], mutation[1], 1).encode())
        assert "\n" not in str(err.value) and "Maren" not in str(err.value)
    after = _snapshot(vault_path)
    assert after == before


def test_consent_history_is_append_only_and_chained(fresh_vault: Vault) -> None:
    import sqlite3

    pid = at(fresh_vault, NOW).enrol(form("consent-all-granted.toml", "h"))["participant_id"]
    amended = (EXAMPLES / "amend-withdraw-recommender.toml").read_text()
    amended = amended.replace('code = "TL-', 'code = "h-', 1)
    at(fresh_vault, NOW + dt.timedelta(days=1)).amend_consent(pid, amended.encode())
    history = fresh_vault.consent_history(pid)
    assert [h["number"] for h in history] == [1, 2]
    assert history[1]["previous_digest"] == history[0]["digest"]
    assert history[1]["purposes"]["recommender-training"]["status"] == "withdrawn"
    with pytest.raises(sqlite3.IntegrityError, match="append-only"):
        fresh_vault._conn.execute("UPDATE consents SET body = x'00'")
