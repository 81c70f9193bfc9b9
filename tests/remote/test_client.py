"""The Python client (notebooks) against a real service: the documents of the local Vault, tree
heads and proofs checked with the vault's key (and offline with vault.verify_proof), RFC 9162
consistency checked client-side, refusals before anything is sent, and throttling as exit 10."""

from __future__ import annotations

from pathlib import Path

import pytest

import vault
from tests.conftest import TEST_PASSPHRASE
from tests.remote.conftest import ANALYST, AUDITOR, SERVICE_PASSPHRASE, make_served_twin, start_server
from vault.remote import connect


@pytest.fixture
def steward(lab):
    with connect(lab["server"].url, lab["tokens"]["steward"]) as v:
        yield v


def test_the_session_is_the_tokens_member(lab) -> None:
    for name, role in (("steward", "steward"), ("omar", "analyst"), ("ines", "auditor")):
        with connect(lab["server"].url, lab["tokens"][name]) as v:
            assert (v.member, v.role) == (name, role)
            assert v.public_key == bytes.fromhex(vault.describe(Path(lab["twins"]) / "local")["public_key"])


def test_all_entries_come_page_by_page_and_match_the_log(steward, lab) -> None:
    entries = steward.audit_entries()
    assert [e["seq"] for e in entries] == list(range(len(entries)))
    assert entries[:3] == steward.audit_entries(0, 3)


def test_heads_and_proofs_verify_with_the_vaults_key_alone(steward) -> None:
    head = steward.sign_head()
    assert head.verify(steward.public_key)
    bundle = steward.prove(head.tree_size - 1)
    assert vault.verify_proof(bundle, steward.public_key)  # what `audit check-proof` does offline
    assert steward.check_consistency(head)["ok"]
    later = steward.sign_head()
    assert later.tree_size >= head.tree_size and steward.check_consistency(head)["ok"]


def test_a_forged_earlier_head_is_not_extended(steward) -> None:
    head = steward.sign_head()
    forged = vault.read_tree_head(__import__("json").dumps(
        {**head.to_dict(), "root_hash": "00" * 32}))
    result = steward.check_consistency(forged)
    assert result["ok"] is False


def test_a_proof_under_another_key_is_refused(lab) -> None:
    """The client checks what the service sends with the key it holds, not the service's say-so."""
    with connect(lab["server"].url, lab["tokens"]["ines"]) as v:
        v._public_key = bytes(32)  # as if the service had swapped its key after connecting
        with pytest.raises(vault.IntegrityError):
            v.prove(0)
        with pytest.raises(vault.IntegrityError):
            v.latest_head()


def test_what_cannot_travel_is_refused_before_sending(steward, lab, tmp_path: Path) -> None:
    before = len(steward.audit_entries())
    (tmp_path / "x.npy").write_bytes(b"\x93NUMPY")
    with pytest.raises(vault.UsageError):
        steward.ingest_eeg(lab["pid"], tmp_path / "x.npy")
    with pytest.raises(vault.UsageError):
        steward.ingest_eeg(lab["pid"], Path(lab["edf"]), sidecar=tmp_path / "x.json")
    with pytest.raises(vault.UsageError):
        steward.add_member("someone", "steward", "a passphrase that would travel")
    with pytest.raises(vault.UsageError):
        steward.export_utility("recommender-training", "ratings-explicit", [1.0], tmp_path / "u.png")
    with pytest.raises(vault.NotFound):
        steward.ingest_eeg(lab["pid"], tmp_path / "missing.edf")
    after = steward.audit_entries()
    assert not [e for e in after[before:] if e.get("action") in ("ingest.eeg", "member.add")]


def test_the_service_errors_arrive_as_the_librarys(lab) -> None:
    with connect(lab["server"].url, lab["tokens"]["omar"]) as v:
        with pytest.raises(vault.PolicyRefusal):
            v.consent_history(lab["pid"])
        with pytest.raises(vault.PolicyRefusal):
            v.ingest_scores(Path(lab["root"]) / "ratings.csv", "explicit")
    with connect(lab["server"].url, lab["tokens"]["steward"]) as v:
        with pytest.raises(vault.NotFound):
            v.consent_history("p-nobody")
        with pytest.raises(vault.UsageError):
            v.ingest_scores(Path(lab["root"]) / "ratings.csv", "nonsense")
    with pytest.raises(vault.AuthenticationFailed) as caught:
        connect(lab["server"].url, "mwt1-" + "0" * 16 + "-" + "1" * 64)
    assert caught.value.message == "authentication failed"


def test_repeated_failed_authentication_is_throttled(lab_files, tmp_path: Path) -> None:
    """More than 10 failures from one address within a minute: exit 10 (the service's rule)."""
    make_served_twin(Path(lab_files["root"]) / "base", tmp_path / "served")
    server = start_server(tmp_path / "served")
    try:
        codes = []
        for _ in range(12):
            try:
                connect(server.url, "mwt1-" + "0" * 16 + "-" + "2" * 64).close()
            except vault.VaultError as exc:
                codes.append(exc.exit_code)
        assert codes[:10] == [3] * 10 and codes[-1] == vault.Throttled.exit_code == 10
    finally:
        server.stop()


def test_the_twin_opens_with_the_service_passphrase_only(lab_files, tmp_path) -> None:
    """The served twin is what the service unlocks: the analyst's and auditor's passphrases no
    longer open it (their key slots went with the conversion), nor the steward's old one."""
    make_served_twin(Path(lab_files["root"]) / "base", tmp_path / "served")
    for member, passphrase in (("omar", ANALYST), ("ines", AUDITOR), ("steward", TEST_PASSPHRASE)):
        with pytest.raises(vault.AuthenticationFailed):
            vault.Vault.open(tmp_path / "served", passphrase, member=member)
    vault.Vault.open(tmp_path / "served", SERVICE_PASSPHRASE).close()
