"""`export eeg`: only granted participants, pseudonymous labels, valid EEG-BIDS, signed manifest."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import mne_bids
import numpy as np
import pyedflib
import pytest

from tests.clock import ManualClock, at
from tests.conftest import ROOT, TEST_PASSPHRASE, assert_absent
from tests.formats.test_bids import _issues, _validator
from vault import IntegrityError, PolicyRefusal, Vault, verify_export

PYEDFLIB_DATA = Path(pyedflib.__file__).parent / "tests" / "data"  # real files shipped in the wheel
SOURCE = PYEDFLIB_DATA / "test_generator.edf"
EXAMPLES = ROOT / "docs" / "examples"
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
IDENTITY = [b"abcxyz99", b"Hans_Muller", b"30-JUN-1969", b"Mr._Spotty"]  # in SOURCE's raw header


def _form(name: str, code: str) -> bytes:
    return (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1).encode()


@pytest.fixture
def lab(fresh_vault: Vault) -> tuple[Vault, list[str], str]:
    granted = []
    for i in range(5):
        pid = at(fresh_vault, NOW).enrol(_form("consent-all-granted.toml", f"g{i}"))["participant_id"]
        at(fresh_vault, NOW).ingest_eeg(pid, SOURCE)
        granted.append(pid)
    refuser = at(fresh_vault, NOW).enrol(_form("consent-no-external.toml", "r"))["participant_id"]
    at(fresh_vault, NOW).ingest_eeg(refuser, SOURCE)
    return fresh_vault, granted, refuser


@pytest.mark.filterwarnings("ignore:Did not find any events.tsv")  # events stay in the EDF+ file
@pytest.mark.parametrize("kind", ["npm", "deno"])
def test_export_is_valid_bids_and_reads_back(lab, tmp_path: Path, kind: str) -> None:
    v, _, _ = lab
    cmd = _validator(kind)
    out = tmp_path / "bids"
    result = at(v, NOW).export_eeg("primary-analysis", out)
    assert result["participants"] == 6  # primary analysis: the no-external form grants it too
    errors, _, _ = _issues(kind, cmd, out)  # the BIDS standard's own validator
    assert errors == []
    subjects = mne_bids.get_entity_vals(out, "subject")
    raw = mne_bids.read_raw_bids(mne_bids.BIDSPath(subject=subjects[0], task="dishes", run=1,
                                                   datatype="eeg", root=out), verbose=False)
    with pyedflib.EdfReader(str(SOURCE)) as ref:  # pyedflib reads the original: same signal
        assert raw.info["nchan"] == ref.signals_in_file
        first = ref.readSignal(0)
    np.testing.assert_allclose(raw.get_data(picks=[0])[0] * 1e6, first[: raw.n_times], atol=1e-3)


def test_refused_participants_are_absent_and_labels_are_per_purpose(lab, tmp_path: Path) -> None:
    v, granted, refuser = lab
    with pytest.raises(PolicyRefusal, match=r"cohort-too-small|recipient"):
        at(v, NOW).export_eeg("external-sharing", tmp_path / "x", recipient="Partner Lab")
    a = at(v, NOW).export_eeg("primary-analysis", tmp_path / "a")
    b = at(v, NOW).export_eeg("primary-analysis", tmp_path / "b")
    c = at(v, NOW).export_eeg("method-development", tmp_path / "c")
    subjects = {k: set(mne_bids.get_entity_vals(tmp_path / k, "subject")) for k in "abc"}
    assert subjects["a"] == subjects["b"]  # stable within a purpose
    assert not subjects["a"] & subjects["c"]  # unlinkable across purposes
    assert a["export_id"] != b["export_id"] != c["export_id"]
    for k in "abc":
        assert_absent(tmp_path / k, *IDENTITY)
        assert not any(pid.encode() in p.read_bytes() for p in (tmp_path / k).rglob("*") if p.is_file()
                       for pid in [*granted, refuser])


def test_manifest_signature_and_file_digests(lab, tmp_path: Path) -> None:
    v, _, _ = lab
    out = tmp_path / "bids"
    at(v, NOW).export_eeg("primary-analysis", out)
    key = v.public_key
    assert verify_export(out, key)["ok"]
    assert not verify_export(out, bytes(32))["ok"]
    doc = json.loads((out / "manifest.json").read_text())
    body = doc["body"]
    assert body["purpose"] == "primary-analysis" and body["cohort_size"] == 6
    assert body["policy_version"] == v.policy.version and body["audit_tree_head"]["tree_size"] > 0
    edf = next(out.rglob("*_eeg.edf"))
    data = bytearray(edf.read_bytes())
    data[-1] ^= 1
    edf.write_bytes(bytes(data))
    result = verify_export(out, key)
    assert not result["ok"] and any("altered" in p for p in result["problems"])
    data[-1] ^= 1
    edf.write_bytes(bytes(data))
    assert verify_export(out, key)["ok"]
    tampered = json.loads(json.dumps(doc))
    tampered["body"]["cohort_size"] = 5
    (out / "manifest.json").write_text(json.dumps(tampered))
    assert verify_export(out, key)["problems"] == ["bad signature"]


def test_export_check_flags_withdrawn_participants(lab, tmp_path: Path) -> None:
    v, granted, _ = lab
    out = tmp_path / "bids"
    at(v, NOW).export_eeg("primary-analysis", out)
    doc = json.loads((out / "manifest.json").read_text())
    assert at(v, NOW).check_export(doc)["must_replace"] is False
    text = _form("consent-all-granted.toml", "g0").decode()
    old = 'granted = ["eeg-raw", "scores-derived", "ratings-explicit", "demographics"]'
    withdrawn = text.replace(old, 'granted = []\nrefused = ["eeg-raw", "scores-derived", '
                             '"ratings-explicit", "demographics"]', 1).replace("explicit = true", "", 1)
    at(v, NOW).amend_consent(granted[0], withdrawn.encode())
    status = at(v, NOW).check_export(doc)
    assert status["must_replace"] and status["consent_no_longer_covers"] == 1
    assert at(v, NOW + dt.timedelta(days=400)).check_export(doc)["export_expired"]
    forged = json.loads(json.dumps(doc))
    forged["body"]["export_id"] = "x-0000"
    with pytest.raises(IntegrityError):
        at(v, NOW).check_export(forged)


# --------------------------------------------------------------------------- demographics


@pytest.fixture
def with_demographics(vault_path: Path) -> Vault:
    """Six participants whose stored headers keep sex and an age band (--keep-sex --age-band)."""
    v = Vault.init(vault_path, TEST_PASSPHRASE, clock=ManualClock(NOW))
    for i in range(6):
        pid = v.enrol(_form("consent-all-granted.toml", f"d{i}"))["participant_id"]
        v.ingest_eeg(pid, SOURCE, keep_sex=True, age_band_years=10)
    yield v
    v.close()


def _patients(out: Path) -> list[tuple[str, str]]:
    found = []
    for edf in sorted(out.rglob("*_eeg.edf")):
        with pyedflib.EdfReader(str(edf)) as r:  # pyedflib reads the exported header
            found.append((r.getSex(), r.getPatientAdditional()))
    return found


def test_demographics_leave_only_under_a_grant_that_covers_them(with_demographics, tmp_path: Path) -> None:
    v = with_demographics
    # SOURCE's patient is male, born 30-JUN-1969, recorded 04-APR-2011 (read from its header):
    # 41 years old, band 40-49 (dateutil-free arithmetic, done by hand).
    plain = tmp_path / "plain"
    v.export_eeg("primary-analysis", plain)  # eeg-raw only: no demographics in the grant
    assert _patients(plain) == [("", "")] * 6
    assert (plain / "participants.tsv").read_text().splitlines()[0] == "participant_id"
    assert_absent(plain, b"age_40-49", b" M X X")
    full = tmp_path / "full"
    v.export_eeg("primary-analysis", full, with_demographics=True)
    assert _patients(full) == [("Male", "age_40-49")] * 6
    rows = (full / "participants.tsv").read_text().splitlines()
    assert rows[0] == "participant_id\tsex\tage_band" and all(r.endswith("\tM\t40-49") for r in rows[1:])
    with pytest.raises(PolicyRefusal):  # method development may never touch demographics
        v.export_eeg("method-development", tmp_path / "refused", with_demographics=True)
    assert not (tmp_path / "refused").exists() or not any((tmp_path / "refused").iterdir())
