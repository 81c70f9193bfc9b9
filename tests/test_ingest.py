"""Ingest of recordings and scores through the vault: consent, de-identification, all or nothing."""

from __future__ import annotations

import datetime as dt
import hashlib
import io
from pathlib import Path

import numpy as np
import pyedflib
import pytest

from tests.conftest import ROOT, TEST_PASSPHRASE, assert_absent, files_of
from vault import InvalidInput, PolicyRefusal, Vault

PYEDFLIB_DATA = Path(pyedflib.__file__).parent / "tests" / "data"  # real files shipped in the wheel
EXAMPLES = ROOT / "docs" / "examples"
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
ENTERED = dt.datetime(2026, 5, 1, 9, 0, tzinfo=dt.UTC)  # before the expired form lapsed: it can be entered


def _form(name: str, code: str) -> bytes:
    return (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1).encode()


@pytest.fixture
def lab(fresh_vault: Vault) -> tuple[Vault, dict[str, str]]:
    pids = {name: fresh_vault.enrol(_form(f"consent-{name}.toml", name),
                                    now=ENTERED if name == "expired" else NOW)["participant_id"]
            for name in ("all-granted", "no-recommender", "expired")}
    return fresh_vault, pids


def _read_back(v: Vault, blob_id: str, tmp_path: Path) -> Path:
    grant = v.authorize("method-development", ["eeg-raw"], now=NOW, cohort=False)
    out = tmp_path / f"{blob_id}.edf"
    out.write_bytes(b"".join(v.read_blob(grant, blob_id, now=NOW)))
    return out


def _snapshot(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in files_of(root) if p.name != "lock" and not p.name.endswith("-shm")}  # shm: a read index


@pytest.mark.parametrize("name", ["test_generator.edf", "test_generator.bdf", "test_subsecond.edf",
                                  "test_utf8.edf"])
def test_signals_survive_ingest_exactly(lab, tmp_path: Path, name: str) -> None:
    v, pids = lab
    source = PYEDFLIB_DATA / name
    result = v.ingest_eeg(pids["all-granted"], source, now=NOW)
    back = _read_back(v, result["blob_id"], tmp_path)
    # pyedflib, an independent reader: digital samples identical, header identity gone
    with pyedflib.EdfReader(str(source)) as a, pyedflib.EdfReader(str(back)) as b:
        assert a.signals_in_file == b.signals_in_file
        for i in range(a.signals_in_file):
            np.testing.assert_array_equal(a.readSignal(i, digital=True), b.readSignal(i, digital=True))
        assert a.getStartdatetime().time() == b.getStartdatetime().time()
        assert b.getPatientName() in ("", "X")
        onsets_a, durations_a, _ = a.readAnnotations()
        onsets_b, durations_b, _ = b.readAnnotations()
        np.testing.assert_array_equal(onsets_a, onsets_b)
        np.testing.assert_array_equal(durations_a, durations_b)
    assert result["deidentification"]["date_shift_applied"]


def test_header_identity_never_reaches_vault_bytes(lab, tmp_path: Path) -> None:
    v, pids = lab
    raw = (PYEDFLIB_DATA / "test_generator.edf").read_bytes()
    # identifying subfields of test_generator.edf, read from its raw header bytes (the oracle):
    # patient 'abcxyz99 M 30-JUN-1969 Hans_Muller', technician 'Mr._Spotty', admin code 'Dr._X'
    needles = [b"abcxyz99", b"30-JUN-1969", b"Hans_Muller", b"Mr._Spotty", b"Dr._X"]
    assert all(n in raw[8:168] for n in needles), "the source must carry them for the test to mean anything"
    v.ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_generator.edf", now=NOW)
    v.ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_generator.edf", now=NOW,
                 keep_header_identity=True)  # kept, but only as ciphertext
    assert_absent(v.path, *needles)


def test_the_same_participant_gets_the_same_date_shift(lab, tmp_path: Path) -> None:
    v, pids = lab
    a = v.ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_generator.edf", now=NOW)
    b = v.ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_subsecond.edf", now=NOW)
    c = v.ingest_eeg(pids["no-recommender"], PYEDFLIB_DATA / "test_generator.edf", now=NOW)
    shifts = []
    for result, src in ((a, "test_generator.edf"), (b, "test_subsecond.edf"), (c, "test_generator.edf")):
        with pyedflib.EdfReader(str(PYEDFLIB_DATA / src)) as orig, \
                pyedflib.EdfReader(str(_read_back(v, result["blob_id"], tmp_path))) as back:
            shifts.append((back.getStartdatetime().date() - orig.getStartdatetime().date()).days)
    assert shifts[0] == shifts[1] != 0
    assert shifts[2] != 0  # another participant's secret shift (equal only by a 1-in-10^4 chance)


def test_ingest_without_consent_for_storage_is_refused_and_audited(lab) -> None:
    v, pids = lab
    before = len(v.blobs())
    with pytest.raises(PolicyRefusal, match="no current consent"):
        v.ingest_eeg(pids["expired"], PYEDFLIB_DATA / "test_generator.edf", now=NOW)
    assert len(v.blobs()) == before
    last = v.audit_entries()[-1]
    assert last["decision"] == "refuse" and last["subjects"] == [pids["expired"]]


@pytest.mark.parametrize("damage", ["empty", "truncated", "not-edf", "wrong-version", "short-header"])
def test_bad_recordings_store_nothing(lab, tmp_path: Path, damage: str) -> None:
    v, pids = lab
    raw = (PYEDFLIB_DATA / "test_generator.edf").read_bytes()
    bad = {"empty": b"", "truncated": raw[: len(raw) - 1000], "not-edf": b"%PDF-1.7 not a recording" * 50,
           "wrong-version": b"9" + raw[1:], "short-header": raw[:200]}[damage]
    path = tmp_path / "broken.edf"
    path.write_bytes(bad)
    before = _snapshot(v.path)
    with pytest.raises(InvalidInput):
        v.ingest_eeg(pids["all-granted"], path, now=NOW)
    assert _snapshot(v.path) == before
    assert not list((v.path / "tmp").iterdir())


def _csv(tmp_path: Path, rows: list[tuple[str, str, str]], name: str = "scores.csv") -> Path:
    path = tmp_path / name
    path.write_text("participant_id,item_id,value\n" + "".join(f"{p},{i},{x}\n" for p, i, x in rows))
    return path


def test_scores_ingest_is_one_transaction_and_idempotent(lab, tmp_path: Path) -> None:
    v, pids = lab
    a, b = pids["all-granted"], pids["no-recommender"]
    path = _csv(tmp_path, [(a, "dish-01", "3"), (a, "dish-02", "0"), (b, "dish-01", "2")])
    first = v.ingest_scores(path, "explicit", now=NOW)
    assert first["batches_stored"] == 2 and first["rows"] == 3
    blobs = len(v.blobs())
    again = v.ingest_scores(path, "explicit", now=NOW)
    assert again["batches_stored"] == 0 and again["batches_already_stored"] == 2
    assert len(v.blobs()) == blobs
    conflicting = _csv(tmp_path, [(a, "dish-01", "1")], "conflict.csv")
    with pytest.raises(InvalidInput, match=r"row 2: .*already has"):
        v.ingest_scores(conflicting, "explicit", now=NOW)
    assert_absent(v.path, b"dish-01", b"dish-02")


@pytest.mark.parametrize(("rows", "kind", "message"), [
    ([("A", "dish-01", "1")], "explicit", "row 2: participant_id"),
    ([("{pid}", "dish-01", "1"), ("{pid}", "dish-01", "2")], "explicit", "row 3: duplicate"),
    ([("{pid}", "dish-01", "x")], "explicit", "row 2: value is not a number"),
    ([("{pid}", "dish-01", "4")], "explicit", "row 2: value outside"),
    ([("{pid}", "dish-01", "1.5")], "explicit", "row 2: .*whole numbers"),
    ([("{pid}", "dish-01", "1.5")], "derived", "row 2: value outside"),
    ([("{pid}", "dish-01", "nan")], "derived", "row 2: value is not a finite"),
    ([("{pid}", "dish-02", "1"), ("0" * 32, "dish-01", "1")], "explicit", "row 3: unknown"),
])
def test_bad_score_files_store_nothing(lab, tmp_path: Path, rows, kind: str, message: str) -> None:
    v, pids = lab
    pid = pids["all-granted"]
    path = _csv(tmp_path, [(p.format(pid=pid), i, x) for p, i, x in rows])
    before = _snapshot(v.path)
    with pytest.raises(InvalidInput, match=message) as err:
        v.ingest_scores(path, kind, now=NOW)
    assert "dish-01" not in str(err.value)
    assert _snapshot(v.path) == before


def test_scores_of_a_participant_without_consent_refuse_the_whole_file(lab, tmp_path: Path) -> None:
    v, pids = lab
    path = _csv(tmp_path, [(pids["all-granted"], "dish-01", "0.5"), (pids["expired"], "dish-01", "0.5")])
    before = len(v.blobs())
    with pytest.raises(PolicyRefusal, match="1 participant"):
        v.ingest_scores(path, "derived", now=NOW)
    assert len(v.blobs()) == before


def test_bad_header_row_and_extra_columns(lab, tmp_path: Path) -> None:
    v, _ = lab
    for text in ("pid,item,value\nx,y,1\n", "participant_id,item_id,value,comment\n", ""):
        path = tmp_path / "bad.csv"
        path.write_text(text)
        with pytest.raises(InvalidInput, match="row 1"):
            v.ingest_scores(path, "explicit", now=NOW)
    assert io  # keep the import list honest for readers


def test_vault_survives_a_reopen_after_ingest(vault_path: Path, tmp_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        pid = v.enrol(_form("consent-all-granted.toml", "r"), now=NOW)["participant_id"]
        blob = v.ingest_eeg(pid, PYEDFLIB_DATA / "test_generator.edf", now=NOW)["blob_id"]
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        assert v.verify()["ok"]
        assert _read_back(v, blob, tmp_path).stat().st_size > 0


def test_numpy_recordings_with_sidecars(lab, tmp_path: Path) -> None:
    import json

    v, pids = lab
    rng = np.random.default_rng(7)
    data = rng.normal(0, 20, size=(4, 256 * 10))  # 4 channels, 10 s at 256 Hz, in µV
    np.save(tmp_path / "rec.npy", data)
    side = {"sampling_rate": 256, "channel_names": ["Fz", "Cz", "Pz", "Oz"], "units": "uV",
            "start_date": "2026-03-02", "start_time": "09:30:00"}
    (tmp_path / "rec.json").write_text(json.dumps(side))
    result = v.ingest_eeg(pids["all-granted"], tmp_path / "rec.npy", sidecar=tmp_path / "rec.json", now=NOW)
    back = _read_back(v, result["blob_id"], tmp_path)
    with pyedflib.EdfReader(str(back)) as edf:  # independent reader of what the vault made
        assert edf.getSignalLabels() == ["Fz", "Cz", "Pz", "Oz"]
        assert edf.getSampleFrequency(0) == 256
        resolution = (edf.getPhysicalMaximum(0) - edf.getPhysicalMinimum(0)) / 65535
        np.testing.assert_allclose(edf.readSignal(2)[: data.shape[1]], data[2], atol=resolution)
    side["channel_names"] = ["Fz", "Cz", "Pz"]  # mismatched sidecar: refused, nothing stored
    (tmp_path / "rec.json").write_text(json.dumps(side))
    before = len(v.blobs())
    with pytest.raises(InvalidInput):
        v.ingest_eeg(pids["all-granted"], tmp_path / "rec.npy", sidecar=tmp_path / "rec.json", now=NOW)
    assert len(v.blobs()) == before
