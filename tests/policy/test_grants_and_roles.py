"""Attacks on the one door from inside Python: widened grants, chosen times, noise-only purposes,
edited roles, auditors with keys, analysts with raw ids. Each of these passed before the fix."""

from __future__ import annotations

import datetime as dt
import inspect
import json
import sqlite3
from pathlib import Path

import pytest
from pydantic import ValidationError

import vault
from tests.clock import ManualClock
from tests.conftest import ROOT, TEST_PASSPHRASE
from vault import AuthenticationFailed, PolicyRefusal, Vault, read_audit_log
from vault.services.exports import pseudonyms

EXAMPLES = ROOT / "docs" / "examples"
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
ANALYST = "analyst passphrase long enough"
AUDITOR = "auditor passphrase long enough"


def form(name: str, code: str) -> bytes:
    return (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1).encode()


@pytest.fixture
def lab(vault_path: Path):
    """Six participants granting every purpose until 2031-03-02, an EEG blob and a score blob
    each, an analyst and an auditor."""
    clock = ManualClock(NOW)
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=clock) as v:
        pids = [v.enrol(form("consent-all-granted.toml", f"g{i}"))["participant_id"] for i in range(6)]
        eeg = {p: v.put_blob(p, "eeg-raw", [f"EEG-OF-{p}".encode()]).blob_id for p in pids}
        scores = {p: v.put_blob(p, "ratings-explicit", [b"RATINGS-" + p.encode()]).blob_id for p in pids}
        identity = {b["pid"]: b["blob_id"] for b in v.blobs() if b["kind"] == "identity-contact"}
        v.add_member("omar", "analyst", ANALYST)
        v.add_member("ines", "auditor", AUDITOR)
    return vault_path, clock, pids, eeg, scores, identity


def entries(path: Path) -> list[dict]:
    with Vault.open(path, TEST_PASSPHRASE) as v:  # folds auditors' notes into the log
        return v.audit_entries()


# --------------------------------------------------------------------------- grants are read-only


def test_a_grant_cannot_be_widened_through_its_attributes(lab) -> None:
    path, clock, pids, eeg, _scores, identity = lab
    with Vault.open(path, ANALYST, member="omar", clock=clock) as a:
        grant = a.authorize("primary-analysis", ["ratings-explicit"])
        for name, value in (("categories", frozenset({"eeg-raw", "identity-contact"})),
                            ("participants", frozenset(pids)), ("purpose", "re-contact"),
                            ("expires_at", NOW + dt.timedelta(days=365)), ("request", None),
                            ("_id", "g-other"), ("_engine", None)):
            with pytest.raises(AttributeError):
                setattr(grant, name, value)
        with pytest.raises(ValidationError):
            grant.request.categories = frozenset({"eeg-raw"})  # the request is a frozen model
        # the reads the attack made: raw EEG and identity under a ratings grant
        for blob in (eeg[pids[0]], identity[pids[0]]):
            with pytest.raises(PolicyRefusal, match="category-not-in-grant"):
                list(a.read_blobs(grant, [blob]))
        assert grant.purpose == "primary-analysis"
        assert sorted(grant.categories) == ["ratings-explicit"]
    log = entries(path)
    reads = [e for e in log if e["action"] == "access.read"]
    assert reads and all(e["purpose"] == "primary-analysis" for e in reads)
    assert {tuple(e["reasons"]) for e in reads if e["decision"] == "refuse"} == {("category-not-in-grant",)}


def test_the_live_check_asks_for_the_category_actually_read(lab) -> None:
    # a grant whose record names two categories re-decides each read for the category read:
    # a participant who withdrew one category loses exactly that one
    path, clock, pids, eeg, scores, _identity = lab
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:
        grant = v.authorize("primary-analysis", ["eeg-raw", "ratings-explicit"])
        text = form("consent-all-granted.toml", "g0").decode()
        old = 'granted = ["eeg-raw", "scores-derived", "ratings-explicit", "demographics"]'
        v.amend_consent(pids[0], text.replace(
            old, 'granted = ["ratings-explicit"]\nrefused = ["eeg-raw", "scores-derived", "demographics"]',
            1).encode())
        assert b"".join(v.read_blob(grant, scores[pids[0]])) == b"RATINGS-" + pids[0].encode()
        with pytest.raises(PolicyRefusal, match="category-not-granted"):
            v.read_blob(grant, eeg[pids[0]])


# --------------------------------------------------------------------------- the vault keeps time


def test_no_public_entry_point_takes_a_time() -> None:
    from vault.services import export_eeg, export_matrix, exports, ingest, report, withdraw

    methods = [m for name, m in inspect.getmembers(Vault, inspect.isfunction) if not name.startswith("_")]
    functions = [getattr(vault, n) for n in vault.__all__ if inspect.isfunction(getattr(vault, n))]
    for module in (export_eeg, export_matrix, exports, ingest, report, withdraw):
        functions += [f for n, f in inspect.getmembers(module, inspect.isfunction)
                      if not n.startswith("_") and f.__module__ == module.__name__]
    for fn in [*methods, *functions, Vault.init, Vault.open]:
        params = inspect.signature(fn).parameters
        if fn in functions and next(iter(params), None) != "v":
            continue  # pure helpers decide on the time they are given; use cases take the vault
        assert "now" not in params and "at" not in params, fn.__qualname__


def test_expiry_is_judged_by_the_vaults_clock(lab) -> None:
    # the attack: a read dated before a consent's expiry returned data after it. Now the read
    # happens when the vault's clock says, and its audit entry carries that time
    path, clock, pids, eeg = lab[:4]
    before = dt.datetime(2031, 3, 1, 23, 50, tzinfo=dt.UTC)  # the forms expire on 2031-03-02
    clock.set(before)
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:
        grant = v.authorize("method-development", ["eeg-raw"])
        assert b"".join(v.read_blob(grant, eeg[pids[0]])) == f"EEG-OF-{pids[0]}".encode()
        clock.advance(minutes=20)  # within the grant's lifetime, after the consent's end
        with pytest.raises(PolicyRefusal, match="consent-expired"):
            v.read_blob(grant, eeg[pids[0]])
        refusal = v.audit_entries()[-1]
        assert (refusal["decision"], refusal["at"]) == ("refuse", "2031-03-02T00:10:00Z")


def test_a_clock_that_moves_back_does_not_reopen_a_grant(lab) -> None:
    path, clock, pids, eeg, _scores, _identity = lab
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:
        grant = v.authorize("method-development", ["eeg-raw"])
        clock.set(NOW - dt.timedelta(days=30))
        with pytest.raises(PolicyRefusal, match="clock-before-grant"):
            v.read_blob(grant, eeg[pids[0]])


# --------------------------------------------------------------------------- noise-only purposes


def test_a_dp_purpose_yields_plaintext_to_no_caller(lab) -> None:
    path, clock, _pids, _eeg, _scores, _identity = lab
    # recommender-training requires DP noise and a cohort of 20: make the cohort large enough
    with Vault.open(path, TEST_PASSPHRASE, clock=clock) as v:
        more = [v.enrol(form("consent-all-granted.toml", f"r{i}"))["participant_id"] for i in range(20)]
        blobs = {p: v.put_blob(p, "ratings-explicit", [b"R"]).blob_id for p in more}
    for passphrase, member in ((TEST_PASSPHRASE, "steward"), (ANALYST, "omar")):
        with Vault.open(path, passphrase, member=member, clock=clock) as v:
            grant = v.authorize("recommender-training", ["ratings-explicit"])
            assert grant.noise_only
            with pytest.raises(PolicyRefusal, match="dp-noise-required"):
                list(v.read_blobs(grant, list(blobs.values())))
            with pytest.raises(PolicyRefusal, match="dp-noise-required"):
                v.read_blob(grant, blobs[more[0]])
            grant = v._context().authorize_release("recommender-training", ["ratings-explicit"], cohort=False)
            with pytest.raises(PolicyRefusal, match="dp-noise-required"):
                v.read_blob(grant, blobs[more[0]])
    refused = [e for e in entries(path) if e["action"] == "access.read" and e["decision"] == "refuse"]
    assert {r for e in refused for r in e["reasons"]} == {"dp-noise-required"}


# --------------------------------------------------------------------------- roles and key slots


@pytest.mark.parametrize("member,passphrase,new_role", [
    ("omar", ANALYST, "steward"), ("ines", AUDITOR, "steward"), ("ines", AUDITOR, "analyst")])
def test_an_edited_role_no_longer_unlocks(lab, member: str, passphrase: str, new_role: str) -> None:
    path = lab[0]
    conn = sqlite3.connect(path / "vault.db")
    with conn:
        conn.execute("UPDATE keyslots SET role = ? WHERE member = ?", (new_role, member))
    conn.close()
    with pytest.raises(AuthenticationFailed):
        Vault.open(path, passphrase, member=member)
    with pytest.raises(AuthenticationFailed):
        read_audit_log(path, passphrase, member=member)


def test_a_slot_moved_to_another_member_no_longer_unlocks(lab) -> None:
    path = lab[0]
    conn = sqlite3.connect(path / "vault.db")
    with conn:  # copy the analyst's slot under a steward's name
        kdf, wrapped = conn.execute(
            "SELECT kdf, wrapped_master FROM keyslots WHERE member = 'omar'").fetchone()
        conn.execute("INSERT INTO keyslots VALUES ('boss', 'steward', ?, ?, '2026-01-01T00:00:00Z')",
                     (kdf, wrapped))
    conn.close()
    with pytest.raises(AuthenticationFailed):
        Vault.open(path, ANALYST, member="boss")


def test_an_auditor_holds_no_key_to_participant_data(lab) -> None:
    path, _clock, _pids, _eeg, _scores, _identity = lab
    with Vault.open(path, TEST_PASSPHRASE) as v:
        master, secret, vault_id = v._door._ring._master, v._door._ring._secret, v.vault_id
    from vault import crypto
    from vault.access.keys import KeyRing
    from vault.crypto import sealing

    conn = sqlite3.connect(path / "vault.db")
    doc, wrapped = conn.execute("SELECT kdf, wrapped_master FROM keyslots WHERE member = 'ines'").fetchone()
    conn.close()
    doc = json.loads(doc)
    assert doc["kind"] == "member"
    inner = sealing.unwrap_master(KeyRing._slot_kek(AUDITOR, crypto.KdfParams.from_dict(doc["kdf"]),
                                                   vault_id, "ines",
                                                   "auditor", "member"), wrapped)
    assert inner not in (master, secret)  # what the passphrase opens is only the member key
    with pytest.raises(PolicyRefusal, match="holds no key"):
        Vault.open(path, AUDITOR, member="ines")
    assert read_audit_log(path, AUDITOR, member="ines")  # yet the log is theirs to read
    log = entries(path)
    noted = [(e["actor"], e["action"], e["decision"]) for e in log if e.get("details", {}).get(
        "recorded_by") == "member-note"]
    assert noted == [("ines", "vault.open", "refuse"), ("ines", "audit.show", "done")]


def test_forged_member_notes_are_logged_as_rejected(lab) -> None:
    path = lab[0]
    conn = sqlite3.connect(path / "vault.db")
    with conn:
        conn.execute("INSERT INTO member_notes (body, mac) VALUES (?, ?)",
                     (b'{"member":"ines","role":"auditor","action":"audit.show"}', b"\0" * 32))
    conn.close()
    log = entries(path)
    assert ("member.note", "rejected") in {(e["action"], e["decision"]) for e in log}
    assert not any(e["actor"] == "ines" for e in log)


def test_analysts_cannot_rekey_read_the_log_or_see_raw_ids(lab) -> None:
    path, clock, pids, eeg, _scores, _identity = lab
    with Vault.open(path, ANALYST, member="omar", clock=clock) as a:
        with pytest.raises(PolicyRefusal, match="stewards only"):
            a.rekey("a new passphrase, long enough")
        with pytest.raises(PolicyRefusal, match="may not read the audit log"):
            a.audit_entries()
        with pytest.raises(PolicyRefusal):
            a.blobs()
        with pytest.raises(PolicyRefusal):
            a.consent_history(pids[0])
        for attr, value in (("role", "steward"), ("member", "steward"), ("policy", None)):
            with pytest.raises(AttributeError):
                setattr(a, attr, value)
        grant = a.authorize("primary-analysis", ["eeg-raw"])
        subjects = {s for _, s, _ in a.read_blobs(grant, [eeg[p] for p in pids[:5]])}
        assert subjects == set(pseudonyms(a._context(), "primary-analysis", pids[:5]).values())
        assert not subjects & set(pids)
        assert grant.participants == set(pseudonyms(a._context(), "primary-analysis", pids).values())
        decision = a.access_check("primary-analysis", ["eeg-raw"])
        assert set(decision.decisions) == set(decision.eligible) == grant.participants
        assert decision.request.participants is None
        with pytest.raises(PolicyRefusal, match="stewards only"):
            a.budget(show_participants=True)
    with pytest.raises(PolicyRefusal):
        read_audit_log(path, ANALYST, member="omar")
    with Vault.open(path, TEST_PASSPHRASE) as v:  # every steward is still there
        assert {m["member"] for m in v.members() if m["role"] == "steward"} == {"steward"}
        log = v.audit_entries()
    refused = {(e["actor"], e["action"]) for e in log if e["decision"] == "refuse"}
    assert {("omar", "vault.rekey"), ("omar", "audit.show"), ("omar", "blobs.list"),
            ("omar", "consent.show")} <= refused


def test_rekey_keeps_auditors_and_role_bound_slots(lab) -> None:
    path, _clock, *_ = lab
    with Vault.open(path, TEST_PASSPHRASE) as v:
        v.rekey("a brand new steward passphrase")
    assert read_audit_log(path, AUDITOR, member="ines")  # member slots wrap no master key
    with pytest.raises(AuthenticationFailed):  # the analyst's slot wrapped the old master key
        Vault.open(path, ANALYST, member="omar")
    Vault.open(path, "a brand new steward passphrase").close()


def _legacy_slot(path: Path, member: str, role: str, passphrase: str, master: bytes) -> None:
    """A key slot as vaults wrote them before roles were bound: the bare Argon2id key wraps the
    master key, and the kdf column holds only the Argon2id parameters."""
    from vault import crypto
    from vault.crypto import sealing

    params = crypto.KdfParams.fresh()
    conn = sqlite3.connect(path / "vault.db")
    with conn:
        conn.execute("INSERT OR REPLACE INTO keyslots VALUES (?, ?, ?, ?, '2026-01-01T00:00:00Z')",
                     (member, role, json.dumps(params.as_dict(), sort_keys=True),
                      sealing.wrap_key(crypto.passphrase_key(passphrase, params), master)))
    conn.close()


def test_legacy_slots_are_bound_to_their_role_at_the_next_unlock(lab) -> None:
    path = lab[0]
    with Vault.open(path, TEST_PASSPHRASE) as v:
        master = v._door._ring._master
    _legacy_slot(path, "steward", "steward", TEST_PASSPHRASE, master)
    _legacy_slot(path, "ines", "auditor", AUDITOR, master)
    with Vault.open(path, TEST_PASSPHRASE) as v:  # opens, and rewrites the slot bound to its role
        assert v.role == "steward"
    with pytest.raises(PolicyRefusal, match="holds no key"):  # the auditor's becomes a member slot
        Vault.open(path, AUDITOR, member="ines")
    conn = sqlite3.connect(path / "vault.db")
    kinds = {m: json.loads(k)["kind"] for m, k in conn.execute("SELECT member, kdf FROM keyslots")}
    conn.close()
    assert kinds == {"steward": "master", "omar": "master", "ines": "member"}
    log = entries(path)
    assert ("steward", "member.slot-bound") in {(e["actor"], e["action"]) for e in log}
    conn = sqlite3.connect(path / "vault.db")
    with conn:
        conn.execute("UPDATE keyslots SET role = 'analyst' WHERE member = 'steward'")
    conn.close()
    with pytest.raises(AuthenticationFailed):
        Vault.open(path, TEST_PASSPHRASE)
