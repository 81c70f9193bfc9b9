"""EEG-BIDS dataset writer (vault.formats.bids), checked from outside.

Outside sources, named again beside each check:
- the BIDS standard's own validators: `bids-validator` 1.15.0 from the npm registry (the
  last Node release) and `bids-validator-deno` 3.0.2 from PyPI (the current schema-based
  validator, BIDS schema 1.11.1); both must report no errors;
- mne-bids (`read_raw_bids`) reads the dataset back; pyedflib (EDFlib) reads the sources;
- `sha256sum` (GNU coreutils) recomputes the digests of the written files;
- electrode names: MNE's colin27_1005 montage (10-05 system, formerly standard_1005);
- the BIDS label rule, alphanumerics only: BIDS specification, "Definitions", from memory.
Inputs are invented EDF+/BDF+ files written here by edfio and pyedflib, run through
`vault.formats.edf.deidentified_blocks` as the export does.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
import tracemalloc
import warnings
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import edfio
import mne
import numpy as np
import pyedflib
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from mne_bids import BIDSPath, read_raw_bids

from vault.errors import Conflict, InvalidInput, UsageError
from vault.formats.bids import README_CAUTIONS, BidsWriter, WrittenFile, channel_type
from vault.formats.edf import DeidOptions, RecordingMeta, deidentified_blocks
from vault.policy.event_codes import EventCodes

ROOT = Path(__file__).resolve().parents[2]
TASK = "dishrating"  # invented study: how appealing photos of plated canteen dishes are
CODES = EventCodes([r"stim/\d{1,4}"])
# Invented identity written into every source; none of it may reach the dataset.
NAME, CODE, BORN, STARTED = "Jolanda_Vermeulen", "MWX88412", dt.date(1991, 5, 17), dt.date(2021, 3, 2)
TECH, ADMIN, EQUIPMENT = "TechQuirinius", "ADMCanteen77", "RigSerial3391Z"
NOTE = "Jolanda Vermeulen liked dish 4, told TechQuirinius"
IDENTITY = [
    "jolanda", "vermeulen", CODE, "quirinius", ADMIN, EQUIPMENT, "LeftHandedCook", "LabRoomBeta12",
    "liked dish", "17-MAY-1991", "17.05.91", "1991-05-17", "02-MAR-2021", "02.03.21", "2021-03-02",
    "Vermeulen cap", "Quirinius filter",
]  # fmt: skip
NPM_VALIDATOR = "bids-validator@1.15.0"
INSTALL_HINT = {
    "npm": f"npm install --prefix {ROOT}/.bids-validator {NPM_VALIDATOR}",
    "deno": "pip install bids-validator-deno==3.0.2",
}


# --------------------------------------------------------------------------- sources


def _edfio_source(path: Path, seed: int) -> None:
    """EDF+ with every identifying subfield filled, by edfio."""
    rng = np.random.default_rng(seed)
    labels = ["Fp1", "Fz", "Cz", "O2", "EOG L"]
    signals = [
        edfio.EdfSignal(rng.normal(0, 20, 256 * 6), 256, label=label, physical_dimension="uV",
                        physical_range=(-200, 200), transducer_type="Vermeulen cap",
                        prefiltering="Quirinius filter")
        for label in labels
    ]  # fmt: skip
    signals.append(edfio.EdfSignal(np.repeat(rng.integers(0, 8, 6), 256).astype(float), 256,
                                   label="Status", physical_range=(0, 255)))  # fmt: skip
    edfio.Edf(
        signals,
        patient=edfio.Patient(code=CODE, sex="F", birthdate=BORN, name=NAME, additional=["LeftHandedCook"]),
        recording=edfio.Recording(
            startdate=STARTED,
            hospital_administration_code=ADMIN,
            investigator_technician_code=TECH,
            equipment_code=EQUIPMENT,
            additional=["LabRoomBeta12"],
        ),
        starttime=dt.time(10, 15, 0),
        annotations=[
            edfio.EdfAnnotation(0.5, None, "stim/1"),
            edfio.EdfAnnotation(1.5, 0.25, NOTE),
            edfio.EdfAnnotation(3.0, 0.5, "stim/12"),
        ],
    ).write(path)


def _pyedflib_source(path: Path, seed: int, *, bdf: bool) -> None:
    """EDF+ or BDF+ with mixed sampling rates (EEG 128 Hz, a MISC channel at 32 Hz), by pyedflib."""
    rng = np.random.default_rng(seed)
    kind = pyedflib.FILETYPE_BDFPLUS if bdf else pyedflib.FILETYPE_EDFPLUS
    digital = (-8388608, 8388607) if bdf else (-32768, 32767)
    chans = [("C3", 128, "uV"), ("C4", 128, "uV"), ("Pz", 128, "uV"), ("ECG", 128, "mV"), ("Resp", 32, "")]
    w = pyedflib.EdfWriter(str(path), len(chans), file_type=kind)
    try:
        w.setSignalHeaders([{"label": label, "dimension": unit, "sample_frequency": rate,
                             "physical_max": 500, "physical_min": -500, "digital_max": digital[1],
                             "digital_min": digital[0], "transducer": "Vermeulen cap",
                             "prefilter": "Quirinius filter"} for label, rate, unit in chans])  # fmt: skip
        w.setPatientName(NAME)
        w.setPatientCode(CODE)
        w.setBirthdate(BORN)
        w.setSex(1)
        w.setPatientAdditional("LeftHandedCook")
        w.setTechnician(TECH)
        w.setAdmincode(ADMIN)
        w.setEquipment(EQUIPMENT)
        w.setRecordingAdditional("LabRoomBeta12")
        w.setStartdatetime(dt.datetime.combine(STARTED, dt.time(9, 0, 0)))
        w.writeSamples([rng.normal(0, 50, rate * 5) for _, rate, _ in chans])
        w.writeAnnotation(1.0, -1, "stim/3")
        w.writeAnnotation(2.0, 0.5, NOTE)
    finally:
        w.close()


@dataclass
class Rec:
    label: str
    session: str | None
    run: int | None
    source: Path
    meta: RecordingMeta
    events: list[tuple[float, float, str]] | None


OPTIONS = DeidOptions(date_offset_days=-4321, event_codes=CODES, keep_sex=True, age_band_years=10)


def _deid(src: Path, block_bytes: int = 4096):
    return deidentified_blocks(src, OPTIONS, block_bytes)  # small blocks: many chunks streamed


@dataclass
class Built:
    root: Path
    files: list[WrittenFile]
    recordings: list[Rec]


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Built:
    src_dir = tmp_path_factory.mktemp("sources")
    sources = [src_dir / "a.edf", src_dir / "b.edf", src_dir / "c.bdf"]
    _edfio_source(sources[0], 1)
    _pyedflib_source(sources[1], 2, bdf=False)
    _pyedflib_source(sources[2], 3, bdf=True)
    for src in sources:  # the identity really is in the sources (else the leak check is vacuous)
        data = src.read_bytes().lower()
        assert b"jolanda" in data and b"quirinius" in data and CODE.lower().encode() in data
    plan = [("k7q2m9", None, 1, sources[0], [(0.5, 0.0, "stim/1"), (3.0, 0.5, "stim/12")]),
            ("k7q2m9", None, 2, sources[1], None),
            ("x4t8b1", None, 1, sources[2], [(1.0, 0.0, "stim/3")])]  # fmt: skip
    root = tmp_path_factory.mktemp("export") / "dataset"
    writer = BidsWriter(root, dataset_name="Canteen dish appeal (invented)", task=TASK,
                        authors=["Invented Lab Member A", "Invented Lab Member B"],
                        ethics_approvals=["Invented University ethics board, ref. 2024-017"],
                        power_line_frequency=50)  # fmt: skip
    recs = []
    for label, session, run, src, events in plan:
        d = _deid(src)
        writer.add_recording(label, session, run, d.header, d.blocks, d.meta, events=events)
        assert d.report.complete
        recs.append(Rec(label, session, run, src, d.meta, events))
    files = writer.finish([{"participant_id": "k7q2m9", "sex": "F", "age_band": "age_20-29"},
                           {"participant_id": "sub-x4t8b1", "sex": "F"}],
                          bidsignore=["manifest*"])  # fmt: skip
    return Built(root, files, recs)


def _disk_files(root: Path) -> set[str]:
    return {p.relative_to(root).as_posix() for p in root.rglob("*") if p.is_file()}


# --------------------------------------------------------------------------- validators


def _npm_validator() -> list[str] | None:
    candidates = [os.environ.get("MINDWARD_BIDS_VALIDATOR"), shutil.which("bids-validator"),
                  ROOT / ".bids-validator/node_modules/.bin/bids-validator",
                  ROOT.parent / ".bids-validator/node_modules/.bin/bids-validator"]  # fmt: skip
    for path in candidates:
        if path and Path(path).is_file() and shutil.which("node"):
            return [str(path)]
    return None


def _deno_validator() -> list[str] | None:
    for path in (shutil.which("bids-validator-deno"), Path(sys.executable).parent / "bids-validator-deno"):
        if path and Path(path).is_file():
            return [str(path)]
    return None


def _validator(kind: str) -> list[str]:
    cmd = _npm_validator() if kind == "npm" else _deno_validator()
    reason = None
    if cmd is not None:
        try:
            version = subprocess.run([*cmd, "--version"], capture_output=True, text=True, timeout=120)
        except (OSError, subprocess.TimeoutExpired) as exc:
            reason = f"{cmd[0]} does not run ({type(exc).__name__})"
        else:
            text = re.sub(r"\x1b\[[0-9;]*m", "", version.stdout + version.stderr)
            if kind == "deno":
                # it prints the git commit of any repository it is installed inside (a .venv in a
                # clone) instead of its version, so ask the installed package instead
                from importlib.metadata import PackageNotFoundError
                from importlib.metadata import version as installed

                with contextlib.suppress(PackageNotFoundError):
                    text += " " + installed("bids-validator-deno")
            want = "1.15.0" if kind == "npm" else "3.0.2"
            if version.returncode != 0 or want not in text:
                reason = f"{cmd[0]} --version did not report {want}: {text.strip()[:80]!r}"
    else:
        reason = "validator not installed"
    if reason:
        reason += f"; install with: {INSTALL_HINT[kind]}"
        if os.environ.get("CI"):
            pytest.fail(reason + " (CI must run the BIDS validator)")
        pytest.skip(reason)
    return cmd  # type: ignore[return-value]


def _issues(kind: str, cmd: list[str], root: Path) -> tuple[list[str], list[str], float]:
    """(errors, warnings, seconds) from one validator run, parsed from its JSON output."""
    t0 = time.perf_counter()
    run = subprocess.run([*cmd, str(root), "--json"], capture_output=True, text=True, timeout=600)
    seconds = time.perf_counter() - t0
    try:
        doc = json.loads(run.stdout)
    except ValueError:
        pytest.fail(f"{kind} validator printed no JSON (exit {run.returncode}): {run.stderr[-500:]}")
    if kind == "npm":  # bids-validator 1.x: {"issues": {"errors": [...], "warnings": [...]}}
        errors = [f"{i['key']}: {i.get('reason', '')}" for i in doc["issues"]["errors"]]
        warns = [i["key"] for i in doc["issues"]["warnings"]]
    else:  # bids-validator 2+/3.x: {"issues": {"issues": [{"code", "severity", ...}]}}
        found = doc["issues"]["issues"]
        errors = [f"{i['code']} {i.get('subCode') or ''} {i.get('location') or ''}" for i in found
                  if i["severity"] == "error"]  # fmt: skip
        warns = [f"{i['code']} {i.get('subCode') or ''}" for i in found if i["severity"] == "warning"]
    return errors, warns, seconds


@pytest.mark.parametrize("kind", ["npm", "deno"])
def test_official_validator_reports_no_errors(kind: str, built: Built, tmp_path: Path) -> None:
    cmd = _validator(kind)
    errors, warns, seconds = _issues(kind, cmd, built.root)  # the BIDS validator (npm or PyPI)
    print(f"{kind} validator: {seconds:.2f} s, {len(warns)} warnings: {sorted(set(warns))}")
    assert errors == []
    # Negative control: the same validator rejects a broken copy (so it really looked).
    broken = tmp_path / "broken"
    shutil.copytree(built.root, broken)
    channels = next(broken.rglob("*_channels.tsv"))
    channels.write_text(channels.read_text().replace("\tEEG\t", "\tBRAIN\t"), encoding="utf-8")
    bad_errors, _, _ = _issues(kind, cmd, broken)
    assert bad_errors, "validator accepted a channels.tsv with an invalid channel type"


# --------------------------------------------------------------------------- read back


def _read_bids(root: Path, rec: Rec) -> mne.io.BaseRaw:
    path = BIDSPath(subject=rec.label, session=rec.session, run=rec.run, task=TASK, datatype="eeg",
                    root=root)  # fmt: skip
    with warnings.catch_warnings():
        # mne-bids' notes on what it does not map (age_band) or find (no events.tsv)
        warnings.filterwarnings("ignore", "Unable to map the following column", RuntimeWarning)
        warnings.filterwarnings("ignore", "Did not find any events.tsv", RuntimeWarning)
        return read_raw_bids(path, verbose="error")


def test_mne_bids_reads_back_what_pyedflib_reads_from_sources(built: Built) -> None:
    for rec in built.recordings:
        raw = _read_bids(built.root, rec)  # mne-bids
        src = pyedflib.EdfReader(str(rec.source))  # pyedflib reads the original
        try:
            idx = [i for i in range(src.signals_in_file) if src.getLabel(i) != "EDF Annotations"]
            labels = [src.getLabel(i) for i in idx]
            assert raw.ch_names == labels == rec.meta.channels
            top = max(src.getSampleFrequency(i) for i in idx)
            assert raw.info["sfreq"] == top
            assert raw.n_times / raw.info["sfreq"] == src.getFileDuration() == rec.meta.duration
            for i in idx:
                if src.getSampleFrequency(i) != top:
                    continue  # MNE resamples slower channels onto the fastest rate
                ours = raw.get_data(picks=[src.getLabel(i)])[0]
                scale = {"uV": 1e-6, "mV": 1e-3}.get(src.getPhysicalDimension(i), 1.0)
                res = (src.getPhysicalMaximum(i) - src.getPhysicalMinimum(i)) / (
                    src.getDigitalMaximum(i) - src.getDigitalMinimum(i)
                )
                np.testing.assert_allclose(ours / scale, src.readSignal(i), rtol=0, atol=res / 100)
        finally:
            src.close()
        kinds = dict(zip(raw.ch_names, raw.get_channel_types(), strict=True))
        expect = {"Fp1": "eeg", "Cz": "eeg", "EOG L": "eog", "Status": "stim", "ECG": "ecg",
                  "Resp": "misc", "C3": "eeg"}  # fmt: skip
        assert all(kinds[name] == kind for name, kind in expect.items() if name in kinds)
        if rec.events is not None:  # events.tsv became the annotations
            got = [(round(a["onset"], 6), round(a["duration"], 6), a["description"]) for a in raw.annotations]
            assert got == [(float(o), float(d), c) for o, d, c in rec.events]


def test_layout_sidecars_and_digests(built: Built) -> None:
    root = built.root
    listed = {f.path: f for f in built.files}
    assert set(listed) == _disk_files(root)  # every file reported, no temp file left
    # sha256sum (GNU coreutils) as independent digest
    out = subprocess.run(["sha256sum", *sorted(listed)], cwd=root, capture_output=True, text=True, check=True)
    sums = {line.split("  ", 1)[1]: line.split("  ", 1)[0] for line in out.stdout.splitlines()}
    assert sums == {p: f.sha256 for p, f in listed.items()}
    assert all(f.size == (root / p).stat().st_size for p, f in listed.items())
    assert "sub-k7q2m9/eeg/sub-k7q2m9_task-dishrating_run-1_eeg.edf" in listed
    assert "sub-x4t8b1/eeg/sub-x4t8b1_task-dishrating_run-1_eeg.bdf" in listed
    assert "sub-k7q2m9/eeg/sub-k7q2m9_task-dishrating_run-2_events.tsv" not in listed
    desc = json.loads((root / "dataset_description.json").read_text())
    assert desc["DatasetType"] == "raw" and desc["GeneratedBy"][0]["Name"] == "mindward"
    assert desc["EthicsApprovals"] and len(desc["Authors"]) == 2
    side = json.loads((root / "sub-k7q2m9/eeg/sub-k7q2m9_task-dishrating_run-2_eeg.json").read_text())
    assert side["SamplingFrequency"] == 128 and side["PowerLineFrequency"] == 50
    assert (side["EEGChannelCount"], side["ECGChannelCount"], side["MiscChannelCount"]) == (3, 1, 1)
    assert side["RecordingDuration"] == 5 and side["TaskName"] == TASK
    rows = (root / "participants.tsv").read_text().splitlines()
    assert rows == ["participant_id\tsex\tage_band", "sub-k7q2m9\tF\t20-29", "sub-x4t8b1\tF\tn/a"]
    readme = (root / "README").read_text()
    assert README_CAUTIONS in readme
    for caution in ("re-identif", "data use agreement", "ethics board", "data-protection officer", "law"):
        assert caution in readme.lower()
    assert (root / ".bidsignore").read_text() == "manifest*\n"


def test_no_identity_in_any_byte(built: Built) -> None:
    for path in built.root.rglob("*"):
        if path.is_file():
            data = path.read_bytes().lower()
            for secret in IDENTITY:
                assert secret.lower().encode() not in data, f"{secret[:4]}... in {path.name}"
    for rec in built.recordings:  # and the signals are the source's, byte for byte
        stem = f"sub-{rec.label}_task-{TASK}_run-{rec.run}_eeg{rec.source.suffix}"
        out = (built.root / f"sub-{rec.label}/eeg" / stem).read_bytes()
        src = rec.source.read_bytes()
        assert len(out) == len(src) == rec.meta.stored_bytes


# --------------------------------------------------------------------------- refusals


def _writer(root: Path, **kw: object) -> BidsWriter:
    return BidsWriter(root, **{"dataset_name": "Canteen dish appeal (invented)", "task": TASK, **kw})  # type: ignore[arg-type]


class Tiny(tuple):
    def __repr__(self) -> str:  # keeps hypothesis' failure reports short
        return "<tiny recording>"


@pytest.fixture(scope="module")
def tiny(tmp_path_factory: pytest.TempPathFactory) -> tuple[bytes, list[bytes], RecordingMeta]:
    src = tmp_path_factory.mktemp("tiny") / "t.edf"
    _edfio_source(src, 9)
    d = _deid(src)
    return Tiny((d.header, list(d.blocks), d.meta))


def test_non_empty_or_file_target_refused(tmp_path: Path) -> None:
    (tmp_path / "full").mkdir()
    (tmp_path / "full" / ".hidden").write_bytes(b"")
    with pytest.raises(Conflict):
        _writer(tmp_path / "full")
    (tmp_path / "afile").write_bytes(b"x")
    with pytest.raises(Conflict):
        _writer(tmp_path / "afile")
    (tmp_path / "empty").mkdir()
    _writer(tmp_path / "empty")  # an existing empty directory is fine
    _writer(tmp_path / "new" / "nested")  # and a new one is created
    assert (tmp_path / "new" / "nested").is_dir()


BIDS_LABEL = re.compile(r"[0-9a-zA-Z]+")  # BIDS specification, "label" (from memory)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(label=st.one_of(st.text(max_size=12), st.from_regex(BIDS_LABEL, fullmatch=True)),
       where=st.sampled_from(["label", "session", "task"]))  # fmt: skip
def test_labels_valid_iff_bids_alphanumeric(label: str, where: str, tiny) -> None:
    header, blocks, meta = tiny
    valid = bool(BIDS_LABEL.fullmatch(label)) and label.isascii() and len(label) <= 64
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "ds"
        try:
            writer = _writer(root, **({"task": label} if where == "task" else {}))
            writer.add_recording(label if where == "label" else "abc", label if where == "session" else None,
                                 1, header, iter(blocks), meta)  # fmt: skip
        except UsageError:
            assert not valid
            assert not [p for p in root.rglob("*") if p.is_file()] if root.exists() else True
        else:
            assert valid
            assert any(p.suffix == ".edf" for p in root.rglob("*"))


def test_bad_calls_refused(tmp_path: Path, tiny) -> None:
    header, blocks, meta = tiny
    w = _writer(tmp_path / "ds")
    for run in (-1, 10000, True, 1.5):
        with pytest.raises(UsageError):
            w.add_recording("abc", None, run, header, iter(blocks), meta)  # type: ignore[arg-type]
    for events in ([(float("nan"), 0.0, "stim/1")], [(0.0, -1.0, "stim/1")], [(0.0, 0.0, "a\tb")],
                   [(0.0, 0.0, "two\nlines")]):  # fmt: skip
        with pytest.raises(UsageError):
            w.add_recording("abc", None, 1, header, iter(blocks), meta, events=events)
    assert _disk_files(tmp_path / "ds") == set()  # refused before anything was written
    w.add_recording("abc", None, 1, header, iter(blocks), meta)
    with pytest.raises(Conflict):  # same participant, session and run
        w.add_recording("abc", None, 1, header, iter(blocks), meta)
    with pytest.raises(Conflict):  # clashes on case-insensitive file systems
        w.add_recording("ABC", None, 2, header, iter(blocks), meta)
    for participants in ([], [{"participant_id": "abc", "name": "Jolanda"}],
                         [{"participant_id": "abc"}, {"participant_id": "sub-abc"}],
                         [{"participant_id": "abc"}, {"participant_id": "zzz"}],
                         [{"participant_id": "abc", "sex": "female"}],
                         [{"participant_id": "abc", "age_band": "23"}],
                         [{"participant_id": "ab-c"}]):  # fmt: skip
        with pytest.raises(UsageError):
            w.finish(participants)
    assert not (tmp_path / "ds" / "participants.tsv").exists()
    w.finish([{"participant_id": "abc", "age_band": "90+"}])
    with pytest.raises(Conflict):
        w.finish([{"participant_id": "abc"}])
    with pytest.raises(Conflict):
        w.add_recording("def", None, 1, header, iter(blocks), meta)
    with pytest.raises(UsageError):  # nothing to export
        _writer(tmp_path / "empty").finish([])
    for bad in ({"task": "dish-rating"}, {"dataset_name": ""}, {"power_line_frequency": -50.0},
                {"authors": ["a\nb"]}):  # fmt: skip
        with pytest.raises(UsageError):
            BidsWriter(tmp_path / "x", **{"dataset_name": "n", "task": TASK, **bad})  # type: ignore[arg-type]


# --------------------------------------------------------------------------- atomicity and streaming


def _failing(blocks: list[bytes], after: int) -> Iterator[bytes]:
    yield from blocks[:after]
    raise InvalidInput("recording file was truncated while it was being read")


def test_failure_mid_stream_leaves_nothing(tmp_path: Path, tiny) -> None:
    header, blocks, meta = tiny
    assert len(blocks) > 2
    w = _writer(tmp_path / "ds")
    with pytest.raises(InvalidInput):
        w.add_recording("abc", None, 1, header, _failing(blocks, 2), meta, events=[(0.5, 0, "stim/1")])
    assert list((tmp_path / "ds").iterdir()) == []  # no EDF, no temp, no sidecars, no folders
    with pytest.raises(InvalidInput):  # stream shorter than its header declares
        w.add_recording("abc", None, 1, header, iter(blocks[:-1]), meta)
    with pytest.raises(KeyboardInterrupt):  # any exception, not only ours

        def interrupted() -> Iterator[bytes]:
            yield blocks[0]
            raise KeyboardInterrupt

        w.add_recording("abc", None, 1, header, interrupted(), meta)
    assert _disk_files(tmp_path / "ds") == set()
    files = w.add_recording("abc", None, 1, header, iter(blocks), meta)  # the same key works afterwards
    assert {f.path for f in files} == _disk_files(tmp_path / "ds")


def test_failure_after_the_edf_removes_the_whole_recording(tmp_path: Path, tiny, monkeypatch) -> None:
    header, blocks, meta = tiny
    w = _writer(tmp_path / "ds")
    real = w._write

    def failing_write(rel: str, data: bytes) -> None:
        if rel.endswith("_channels.tsv"):  # EDF and _eeg.json are in place by now
            raise OSError(5, "simulated I/O error")
        real(rel, data)

    monkeypatch.setattr(w, "_write", failing_write)
    with pytest.raises(OSError):
        w.add_recording("abc", "1", 1, header, iter(blocks), meta, events=[(0.5, 0, "stim/1")])
    assert list((tmp_path / "ds").iterdir()) == []
    monkeypatch.setattr(w, "_write", real)
    w.add_recording("abc", None, 1, header, iter(blocks), meta)  # the key was not taken


def test_source_truncated_while_streaming_leaves_nothing(tmp_path: Path) -> None:
    src = tmp_path / "t.edf"
    _edfio_source(src, 4)
    d = _deid(src)  # header validated now, records streamed later
    with src.open("r+b") as f:
        f.truncate(src.stat().st_size - 100)
    w = _writer(tmp_path / "ds")
    with pytest.raises(InvalidInput):
        w.add_recording("abc", None, None, d.header, d.blocks, d.meta)
    assert _disk_files(tmp_path / "ds") == set()


def test_streaming_memory_bounded(tmp_path: Path) -> None:
    block, count = b"\x01\x02" * (128 * 1024), 96  # 24 MiB in 256 KiB blocks
    meta = RecordingMeta(format="EDF+C", channels=["Cz"], units=["uV"], sampling_rates=[256.0],
                         samples_per_record=[256], n_samples=[256], n_records=1, record_duration=1.0,
                         duration=1.0, bytes_per_sample=2, stored_bytes=256 + len(block) * count)  # fmt: skip
    w = _writer(tmp_path / "ds")
    tracemalloc.start()
    try:
        w.add_recording("abc", None, None, b"\x00" * 256, (block for _ in range(count)), meta)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 4 * len(block)  # a whole-file load would need 24 MiB
    assert (tmp_path / "ds/sub-abc/eeg/sub-abc_task-dishrating_eeg.edf").stat().st_size == meta.stored_bytes


# --------------------------------------------------------------------------- channel types


def test_10_05_electrodes_are_eeg() -> None:
    names = mne.channels.make_standard_montage("colin27_1005").ch_names  # MNE's 10-05 montage
    assert len(names) > 300
    assert [n for n in names if channel_type(n) != "EEG"] == []
    assert [n for n in names if channel_type(f"EEG {n}-REF") != "EEG"] == []


@pytest.mark.parametrize(("label", "kind"), [
    ("EOG L", "EOG"), ("HEOG", "EOG"), ("VEOG-R", "EOG"), ("ECG", "ECG"), ("EKG1", "ECG"),
    ("EMG chin", "EMG"), ("Status", "TRIG"), ("TRIG", "TRIG"), ("STI 014", "TRIG"),
    ("Resp", "MISC"), ("Temp", "MISC"), ("GSR", "MISC"), ("EEG Foo", "EEG"), ("Fz-Cz", "EEG"),
])  # fmt: skip
def test_channel_type_rules(label: str, kind: str) -> None:
    assert channel_type(label) == kind  # common practice, no source
