"""Ingest of recordings and scores through the vault: consent, de-identification, all or nothing."""

from __future__ import annotations

import datetime as dt
import hashlib
import io
import json
from pathlib import Path

import numpy as np
import pyedflib
import pytest

from tests.clock import ManualClock, at, ctx_at
from tests.conftest import ROOT, TEST_PASSPHRASE, assert_absent, files_of
from vault import InvalidInput, PolicyRefusal, UsageError, Vault

PYEDFLIB_DATA = Path(pyedflib.__file__).parent / "tests" / "data"  # real files shipped in the wheel
EXAMPLES = ROOT / "docs" / "examples"
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
ENTERED = dt.datetime(2026, 5, 1, 9, 0, tzinfo=dt.UTC)  # before the expired form lapsed: it can be entered


def _form(name: str, code: str) -> bytes:
    return (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1).encode()


@pytest.fixture
def lab(fresh_vault: Vault) -> tuple[Vault, dict[str, str]]:
    pids = {name: at(fresh_vault, ENTERED if name == "expired" else NOW).enrol(
                _form(f"consent-{name}.toml", name))["participant_id"]
            for name in ("all-granted", "no-recommender", "expired")}
    return fresh_vault, pids


def _read_back(v: Vault, blob_id: str, tmp_path: Path) -> Path:
    grant = ctx_at(v, NOW).authorize_release("method-development", ["eeg-raw"], cohort=False)
    out = tmp_path / f"{blob_id}.edf"
    out.write_bytes(b"".join(at(v, NOW).read_blob(grant, blob_id)))
    return out


def _snapshot(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in files_of(root) if p.name != "lock" and not p.name.endswith("-shm")}  # shm: a read index


@pytest.mark.parametrize("name", ["test_generator.edf", "test_generator.bdf", "test_subsecond.edf",
                                  "test_utf8.edf"])
def test_signals_survive_ingest_exactly(lab, tmp_path: Path, name: str) -> None:
    v, pids = lab
    source = PYEDFLIB_DATA / name
    result = at(v, NOW).ingest_eeg(pids["all-granted"], source)
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
    at(v, NOW).ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_generator.edf")
    at(v, NOW).ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_generator.edf",
                 keep_header_identity=True)  # kept, but only as ciphertext
    assert_absent(v.path, *needles)


def test_the_same_participant_gets_the_same_date_shift(lab, tmp_path: Path) -> None:
    v, pids = lab
    a = at(v, NOW).ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_generator.edf")
    b = at(v, NOW).ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_subsecond.edf")
    c = at(v, NOW).ingest_eeg(pids["no-recommender"], PYEDFLIB_DATA / "test_generator.edf")
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
        at(v, NOW).ingest_eeg(pids["expired"], PYEDFLIB_DATA / "test_generator.edf")
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
        at(v, NOW).ingest_eeg(pids["all-granted"], path)
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
    first = at(v, NOW).ingest_scores(path, "explicit")
    assert first["batches_stored"] == 2 and first["rows"] == 3
    blobs = len(v.blobs())
    again = at(v, NOW).ingest_scores(path, "explicit")
    assert again["batches_stored"] == 0 and again["batches_already_stored"] == 2
    assert len(v.blobs()) == blobs
    conflicting = _csv(tmp_path, [(a, "dish-01", "1")], "conflict.csv")
    with pytest.raises(InvalidInput, match=r"row 2: .*already has"):
        at(v, NOW).ingest_scores(conflicting, "explicit")
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
        at(v, NOW).ingest_scores(path, kind)
    assert "dish-01" not in str(err.value)
    assert _snapshot(v.path) == before


def test_scores_of_a_participant_without_consent_refuse_the_whole_file(lab, tmp_path: Path) -> None:
    v, pids = lab
    path = _csv(tmp_path, [(pids["all-granted"], "dish-01", "0.5"), (pids["expired"], "dish-01", "0.5")])
    before = len(v.blobs())
    with pytest.raises(PolicyRefusal, match="1 participant"):
        at(v, NOW).ingest_scores(path, "derived")
    assert len(v.blobs()) == before


def test_bad_header_row_and_extra_columns(lab, tmp_path: Path) -> None:
    v, _ = lab
    for text in ("pid,item,value\nx,y,1\n", "participant_id,item_id,value,comment\n", ""):
        path = tmp_path / "bad.csv"
        path.write_text(text)
        with pytest.raises(InvalidInput, match="row 1"):
            at(v, NOW).ingest_scores(path, "explicit")
    assert io  # keep the import list honest for readers


def test_vault_survives_a_reopen_after_ingest(vault_path: Path, tmp_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        pid = at(v, NOW).enrol(_form("consent-all-granted.toml", "r"))["participant_id"]
        blob = at(v, NOW).ingest_eeg(pid, PYEDFLIB_DATA / "test_generator.edf")["blob_id"]
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
    result = at(v, NOW).ingest_eeg(pids["all-granted"], tmp_path / "rec.npy", sidecar=tmp_path / "rec.json")
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
        at(v, NOW).ingest_eeg(pids["all-granted"], tmp_path / "rec.npy", sidecar=tmp_path / "rec.json")
    assert len(v.blobs()) == before


# --------------------------------------------------------------------------- de-identification holes
# New tests read time from an injected clock (tests/clock.py), never a per-call `now=`.


@pytest.fixture
def clocked(vault_path: Path):
    v = Vault.init(vault_path, TEST_PASSPHRASE, clock=ManualClock(NOW))
    pids = {name: v.enrol(_form(f"consent-{name}.toml", name))["participant_id"]
            for name in ("all-granted", "no-recommender")}
    yield v, pids
    v.close()


def _pyedflib_file(path: Path, labels: list[tuple[str, str]], notes: list[str],
                   start: dt.datetime = dt.datetime(2021, 3, 2, 10, 0, 0)) -> Path:
    """An EDF+ written by pyedflib (EDFlib) with the given (label, unit) pairs and annotations."""
    w = pyedflib.EdfWriter(str(path), len(labels), file_type=pyedflib.FILETYPE_EDFPLUS)
    w.setSignalHeaders([{"label": label, "dimension": unit, "sample_frequency": 256,
                         "physical_max": 100, "physical_min": -100, "digital_max": 32767,
                         "digital_min": -32768, "transducer": "", "prefilter": ""}
                        for label, unit in labels])  # fmt: skip
    w.setStartdatetime(start)
    w.writeSamples([np.sin(np.arange(256 * 4) / (3 + i)) * 50 for i in range(len(labels))])
    for i, text in enumerate(notes):
        w.writeAnnotation(0.25 + i * 0.5, -1, text)
    w.close()
    return path


def _read_back_clocked(v: Vault, blob_id: str, tmp_path: Path) -> Path:
    grant = v._context().authorize_release("method-development", ["eeg-raw"], cohort=False)
    out = tmp_path / f"{blob_id}.edf"
    out.write_bytes(b"".join(v.read_blob(grant, blob_id)))
    return out


def test_free_text_labels_and_units_never_reach_the_vault_or_an_export(clocked, tmp_path: Path) -> None:
    v, pids = clocked
    src = _pyedflib_file(tmp_path / "named.edf", [("Fz Jane Roebuck", "uV"), ("EEG FCC5h-REF", "Roebuck"),
                                                  ("", "uV")], ["stim/dish-07"])  # fmt: skip
    assert b"Jane Roebuck" in src.read_bytes()  # the source carries them (pyedflib wrote them)
    result = v.ingest_eeg(pids["all-granted"], src)
    report = result["deidentification"]
    assert (report["labels_replaced"], report["units_replaced"]) == (2, 1)
    assert result["recording"]["channels"] == ["CH01", "EEG FCC5h-REF", "CH03"]
    assert "Roebuck" not in json.dumps(result)
    # Nothing of the channel metadata sits in the clear: not the free text, not even the
    # kept label (the database, its WAL and every blob file were searched).
    assert_absent(v.path, b"Roebuck", b"Jane", b"FCC5h-REF", b"sampling_rates")
    with pyedflib.EdfReader(str(_read_back_clocked(v, result["blob_id"], tmp_path))) as back:
        assert back.getSignalLabels() == ["CH01", "EEG FCC5h-REF", "CH03"]  # pyedflib reads it
        assert [back.getPhysicalDimension(i) for i in range(3)] == ["uV", "", "uV"]
    out = tmp_path / "bids"
    v.export_eeg("method-development", out)  # the export reads channels from the stored header
    channels = next(out.rglob("*_channels.tsv")).read_text().splitlines()
    assert [row.split("\t")[0] for row in channels[1:]] == ["CH01", "EEG FCC5h-REF", "CH03"]
    assert_absent(out, b"Roebuck", b"Jane")


def test_numpy_sidecar_labels_and_units_are_policed_too(clocked, tmp_path: Path) -> None:
    v, pids = clocked
    np.save(tmp_path / "rec.npy", np.zeros((2, 512)))
    (tmp_path / "rec.json").write_text(json.dumps({
        "sampling_rate": 256, "channel_names": ["Cz", "Jane Roebuck"], "units": ["uV", "Roebuck"]}))
    result = v.ingest_eeg(pids["all-granted"], tmp_path / "rec.npy", sidecar=tmp_path / "rec.json")
    assert result["recording"]["channels"] == ["Cz", "CH02"]
    assert result["deidentification"]["units_replaced"] == 1
    assert_absent(v.path, b"Roebuck")


def test_free_text_after_a_stimulus_prefix_is_relabelled(clocked, tmp_path: Path) -> None:
    v, pids = clocked
    src = _pyedflib_file(tmp_path / "notes.edf", [("Cz", "uV")],
                         ["stim/dish-07", "stim/Zelda_visit", "block/start"])  # fmt: skip
    result = v.ingest_eeg(pids["all-granted"], src)  # the shipped policy set's event codes
    with pyedflib.EdfReader(str(_read_back_clocked(v, result["blob_id"], tmp_path))) as back:
        texts = list(back.readAnnotations()[2])  # pyedflib
    assert texts == ["stim/dish-07", "event", "block/start"]
    assert result["deidentification"]["annotations_relabelled"] == 1


@pytest.mark.parametrize("codes", ["(a+)+$", "stim/.*", "stim/[A-Za-z_]+", r"stim/\d+"])
def test_regular_expressions_are_refused_as_event_codes(clocked, tmp_path: Path, codes: str) -> None:
    v, pids = clocked
    before = _snapshot(v.path)
    with pytest.raises(UsageError, match=r"digit runs"):
        v.ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_subsecond.edf", event_codes=codes)
    assert _snapshot(v.path) == before


def test_a_declared_list_of_event_codes_is_honoured(clocked, tmp_path: Path) -> None:
    v, pids = clocked
    result = v.ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_subsecond.edf",
                          event_codes=["XLEvent", "XLSpike"])
    with pyedflib.EdfReader(str(_read_back_clocked(v, result["blob_id"], tmp_path))) as back:
        texts = set(back.readAnnotations()[2])  # pyedflib
    assert texts == {"XLEvent", "XLSpike", "event"}  # "Clip Note" relabelled


def _placeholder_dated(tmp_path: Path, *, plus: bool) -> Path:
    """A valid file dated 01.01.85: EDF+ with "Startdate X" (date unknown) or plain EDF."""
    if plus:
        src = _pyedflib_file(tmp_path / "anon.edf", [("Cz", "uV")], ["stim/dish-01"])
        data = bytearray(src.read_bytes())
        data[88:168] = b"Startdate X X X X".ljust(80)  # EDF+ anonymised date (EDF+ spec, from memory)
        data[168:176] = b"01.01.85"
    else:
        data = bytearray((PYEDFLIB_DATA / "test_legacy.edf").read_bytes())
        data[168:176] = b"01.01.85"  # plain EDF: a real (if odd) date, 1985's first day
    path = tmp_path / ("anon.edf" if plus else "early.edf")
    path.write_bytes(bytes(data))
    return path


def test_an_earlier_dated_file_is_clamped_never_refused(clocked, tmp_path: Path) -> None:
    v, pids = clocked
    pid = pids["all-granted"]
    v.ingest_eeg(pid, PYEDFLIB_DATA / "test_generator.edf")  # 2011: the offset goes years back
    early = v.ingest_eeg(pid, _placeholder_dated(tmp_path, plus=False))
    assert early["deidentification"]["date_clamped"]
    back = _read_back_clocked(v, early["blob_id"], tmp_path).read_bytes()
    assert back[168:176] == b"01.01.85"  # clamped to the window's first day
    anon = v.ingest_eeg(pid, _placeholder_dated(tmp_path, plus=True))
    report = anon["deidentification"]
    assert not report["date_shift_applied"] and not report["date_clamped"]
    back = _read_back_clocked(v, anon["blob_id"], tmp_path).read_bytes()
    assert back[88:168].split() == [b"Startdate", b"X", b"X", b"X", b"X"] and back[168:176] == b"01.01.85"


def _annotation_only(tmp_path: Path) -> Path:
    """EDF+ with only an annotation signal (header layout: EDF/EDF+ specifications, from memory)."""
    fixed = [b"0", b"X X X X", b"Startdate 02-MAR-2021 X X X", b"02.03.21", b"10.00.00", b"512",
             b"EDF+C", b"1", b"0", b"1"]  # fmt: skip
    widths = [8, 80, 80, 8, 8, 8, 44, 8, 8, 4]
    signal = [(b"EDF Annotations", 16), (b"", 80), (b"", 8), (b"-1", 8), (b"1", 8), (b"-32768", 8),
              (b"32767", 8), (b"", 80), (b"30", 8), (b"", 32)]  # fmt: skip
    header = b"".join(f.ljust(w) for f, w in zip(fixed, widths, strict=True))
    header += b"".join(f.ljust(w) for f, w in signal)
    record = b"+0\x14\x14\x00+1\x14stim/dish-01\x14\x00".ljust(60, b"\x00")
    path = tmp_path / "annotations-only.edf"
    path.write_bytes(header + record)
    return path


def test_a_file_the_export_would_refuse_is_refused_at_ingest(clocked, tmp_path: Path) -> None:
    v, pids = clocked
    before = _snapshot(v.path)
    with pytest.raises(InvalidInput, match="no ordinary signals"):
        v.ingest_eeg(pids["all-granted"], _annotation_only(tmp_path))
    assert _snapshot(v.path) == before  # no blob, no row, no date offset chosen
    # An empty label is replaced at ingest, so the participant's recordings still export.
    src = _pyedflib_file(tmp_path / "empty-label.edf", [("", "uV"), ("Cz", "uV")], [])
    v.ingest_eeg(pids["all-granted"], src)
    v.ingest_eeg(pids["all-granted"], PYEDFLIB_DATA / "test_subsecond.edf")
    assert v.export_eeg("method-development", tmp_path / "bids")["recordings"] == 2


def test_the_cli_refuses_an_unexportable_file_with_exit_8(vault_path: Path, tmp_path: Path,
                                                           capsys, monkeypatch) -> None:
    from vault.cli.app import main

    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        pid = v.enrol(_form("consent-all-granted.toml", "cli"))["participant_id"]
    monkeypatch.setenv("MINDWARD_PASSPHRASE", TEST_PASSPHRASE)
    code = main(["ingest", "eeg", pid, str(_annotation_only(tmp_path)), "--vault", str(vault_path)])
    _, err = capsys.readouterr()
    assert code == 8 and err.count("\n") == 1 and "no ordinary signals" in err  # docs/cli.md table


def test_re_ingest_is_idempotent(clocked, tmp_path: Path) -> None:
    v, pids = clocked
    a, b = pids["all-granted"], pids["no-recommender"]
    first = v.ingest_eeg(a, PYEDFLIB_DATA / "test_generator.edf")
    blobs = len(v.blobs())
    again = v.ingest_eeg(a, PYEDFLIB_DATA / "test_generator.edf", keep_sex=True)
    assert again["already_stored"] and again["blob_id"] == first["blob_id"]
    assert len(v.blobs()) == blobs
    last = v.audit_entries()[-1]
    assert last["action"] == "ingest.eeg" and last["details"] == {"blob": first["blob_id"],
                                                                  "already_stored": True}
    copy = tmp_path / "copy.edf"  # same content under another name: still the same recording
    copy.write_bytes((PYEDFLIB_DATA / "test_generator.edf").read_bytes())
    assert v.ingest_eeg(a, copy)["already_stored"]
    other = v.ingest_eeg(b, copy)  # another participant's key: a recording of their own
    assert not other["already_stored"] and len(v.blobs()) == blobs + 1
    changed = bytearray(copy.read_bytes())
    changed[int(changed[184:192]) + 1] ^= 1  # one sample of the first record: another recording
    copy.write_bytes(bytes(changed))
    assert not v.ingest_eeg(a, copy)["already_stored"]
    out = tmp_path / "bids"
    v.export_eeg("method-development", out)
    runs = sorted(p.name for p in out.rglob("*_eeg.edf"))
    assert len(runs) == 3  # a: two different recordings, b: one; never the duplicate


def test_a_vault_without_the_content_tag_column_gains_it_at_open(vault_path: Path) -> None:
    import sqlite3

    Vault.init(vault_path, TEST_PASSPHRASE).close()
    conn = sqlite3.connect(vault_path / "vault.db")  # make it look like a vault of before
    conn.execute("DROP INDEX idx_recordings_pid_content_tag")
    conn.execute("ALTER TABLE recordings DROP COLUMN content_tag")
    conn.commit()
    conn.close()
    with Vault.open(vault_path, TEST_PASSPHRASE, clock=ManualClock(NOW)) as v:
        pid = v.enrol(_form("consent-all-granted.toml", "old"))["participant_id"]
        first = v.ingest_eeg(pid, PYEDFLIB_DATA / "test_subsecond.edf")
        assert v.ingest_eeg(pid, PYEDFLIB_DATA / "test_subsecond.edf")["blob_id"] == first["blob_id"]


def test_metadata_an_earlier_version_kept_in_clear_is_scrubbed_at_open(vault_path: Path) -> None:
    import sqlite3

    with Vault.init(vault_path, TEST_PASSPHRASE, clock=ManualClock(NOW)) as v:
        pid = v.enrol(_form("consent-all-granted.toml", "old"))["participant_id"]
        blob = v.ingest_eeg(pid, PYEDFLIB_DATA / "test_subsecond.edf")["blob_id"]
    old_meta = {"format": "EDF+C", "channels": ["Fz Quentin Marlowe"], "units": ["Marlowe"]}
    old_deid = {"fields_changed": ["patient.name", "recording.technician"], "sex_kept": True,
                "date_shift_applied": True, "annotations": 3, "annotations_relabelled": 1}
    conn = sqlite3.connect(vault_path / "vault.db")  # what an earlier version stored in clear
    conn.execute("UPDATE recordings SET meta = ?, deid = ? WHERE blob_id = ?",
                 (json.dumps(old_meta), json.dumps(old_deid), blob))
    conn.commit()
    conn.close()
    with Vault.open(vault_path, TEST_PASSPHRASE, clock=ManualClock(NOW)) as v:
        row = v._conn.execute("SELECT meta, deid FROM recordings").fetchone()
        assert row[0] == "{}"
        assert json.loads(row[1])["fields_changed"] == 2 and json.loads(row[1])["sex_kept"]
        assert v.audit_entries()[-1]["action"] == "recordings.scrub"
    assert_absent(vault_path, b"Quentin Marlowe", b"patient.name")  # secure_delete, WAL folded at close
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:  # idempotent: nothing more to do
        assert [e["action"] for e in v.audit_entries()].count("recordings.scrub") == 1
