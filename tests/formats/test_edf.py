"""De-identified EDF / EDF+ / BDF streaming (vault.formats.edf, vault.formats.edf_header).

Outside sources, named again beside each check:
- input: the EDF/EDF+/BDF files shipped in the pyedflib package (pyedflib/tests/data);
- independent readers: pyedflib (wraps the C library EDFlib) and edfio;
- header byte layout (offsets 0/8/88/168/.../252, 256 per signal): the EDF specification
  (Kemp et al. 1992) and EDF+ (Kemp & Olivan 2003), from memory;
- calendar arithmetic: numpy.datetime64 and dateutil.relativedelta;
- uniformity: scipy.stats.chisquare.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import io
import json
import pickle
import re
import tracemalloc
import warnings
from pathlib import Path

import edfio
import numpy as np
import pyedflib
import pytest
from dateutil.relativedelta import relativedelta
from edfio.edf_annotations import _EdfAnnotationsDataRecord
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from mindward_bench.edf import write_test_edf
from scipy import stats

from vault import crypto
from vault.errors import InvalidInput, NotFound, VaultError
from vault.formats.edf import (
    AnnotationCounts,
    DeidOptions,
    deidentified_blocks,
    npy_deidentified_blocks,
    rewrite_annotations,
)
from vault.formats.edf_header import (
    EDF_FIRST_DATE,
    EDF_LAST_DATE,
    choose_date_offset,
    deidentify_header,
    parse_header,
    read_header,
    shifted_date,
    uniform_below,
)
from vault.policy.event_codes import EventCodes

DATA = Path(pyedflib.__file__).parent / "tests" / "data"
EDF_FILES = ["test_generator.edf", "test_legacy.edf", "test_subsecond.edf", "test_utf8.edf"]
BDF_FILES = [
    "test_generator.bdf",
    "test_generator_datarec_generator_0_5.bdf",
    "test_generator_datarec_generator_2.bdf",
]
OFFSET = -2345
# The declared codes (vault.policy.event_codes) and, as oracle, the same set as a plain regex
# (ASCII digits only: Python's \d would also match other scripts' digits).
CODES = EventCodes(["XLEvent", "XLSpike", r"stim/\d{1,4}", r"S\d{1,3}"])
CODES_RE = re.compile(r"XLEvent|XLSpike|stim/[0-9]{1,4}|S[0-9]{1,3}")
SLOW = settings(deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


def sample(name: str) -> Path:
    path = DATA / name
    if not path.exists():
        pytest.skip(f"pyedflib's test data not installed ({name})")
    return path


def opts(**kw: object) -> DeidOptions:
    return DeidOptions(date_offset_days=kw.pop("offset", OFFSET), event_codes=CODES, **kw)


def deid(src: Path, tmp: Path, options: DeidOptions | None = None, block: int = 1 << 20):
    d = deidentified_blocks(src, options or opts(), block)
    out = tmp / ("out" + src.suffix)
    out.write_bytes(d.header + b"".join(d.blocks))
    return out, d


# Raw header oracle, straight from the EDF specification's byte layout (from memory).
SIGNAL_LAYOUT = [("label", 16), ("transducer", 80), ("dimension", 8), ("pmin", 8),
                 ("pmax", 8), ("dmin", 8), ("dmax", 8), ("prefilter", 80), ("spr", 8),
                 ("reserved", 32)]  # fmt: skip


def raw_header(data: bytes) -> tuple[dict[str, bytes], list[dict[str, bytes]]]:
    fixed = {"version": data[0:8], "patient": data[8:88], "recording": data[88:168],
             "startdate": data[168:176], "starttime": data[176:184], "header_bytes": data[184:192],
             "reserved": data[192:236], "n_records": data[236:244], "duration": data[244:252],
             "ns": data[252:256]}  # fmt: skip
    ns, off, cols = int(fixed["ns"]), 256, {}
    for name, width in SIGNAL_LAYOUT:
        cols[name] = [data[off + i * width : off + (i + 1) * width] for i in range(ns)]
        off += width * ns
    return fixed, [{n: cols[n][i] for n, _ in SIGNAL_LAYOUT} for i in range(ns)]


def record_columns(data: bytes) -> tuple[np.ndarray, np.ndarray]:
    """Records as a (n_records, record_bytes) array and a mask of annotation bytes."""
    fixed, sigs = raw_header(data)
    bps = 3 if data[0] == 0xFF else 2
    widths = [int(s["spr"]) * bps for s in sigs]
    mask = np.concatenate(
        [
            np.full(w, s["label"].strip() in (b"EDF Annotations", b"BDF Annotations"))
            for w, s in zip(widths, sigs, strict=True)
        ]
    )
    body = np.frombuffer(data, np.uint8, offset=int(fixed["header_bytes"]))
    return body.reshape(int(fixed["n_records"]), sum(widths)), mask


def read_edfio(path: Path):
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # edfio must open it without complaint
        return (edfio.read_bdf if path.suffix == ".bdf" else edfio.read_edf)(path)


def header_date(raw: bytes) -> dt.date:
    day, month, yy = (int(x) for x in raw.decode().split("."))
    return dt.date(1900 + yy if yy >= 85 else 2000 + yy, month, day)  # EDF 1985-2084 rule


# --------------------------------------------------------------------------- real files


@pytest.mark.parametrize("name", EDF_FILES + BDF_FILES)
def test_signals_byte_identical_and_both_readers_open(name: str, tmp_path: Path) -> None:
    src = sample(name)
    out, d = deid(src, tmp_path)
    a, b = src.read_bytes(), out.read_bytes()
    assert len(a) == len(b) == d.meta.stored_bytes
    rec_a, mask = record_columns(a)
    rec_b, mask_b = record_columns(b)
    assert np.array_equal(mask, mask_b)
    assert np.array_equal(rec_a[:, ~mask], rec_b[:, ~mask])  # raw bytes: the oracle
    # pyedflib (EDFlib) as independent reader: digital identical, physical within resolution.
    ra, rb = pyedflib.EdfReader(str(src)), pyedflib.EdfReader(str(out))
    try:
        assert rb.signals_in_file == ra.signals_in_file
        for i in range(ra.signals_in_file):
            if ra.getLabel(i) in ("EDF Annotations", "BDF Annotations"):
                continue
            # the only channel names in pyedflib's files are Fp1 (10-20) and pulse (a usual
            # physiological channel), read with pyedflib; the rest ("sine 1 Hz",
            # "squarewave") become CHnn by position
            want = ra.getLabel(i) if ra.getLabel(i) in ("Fp1", "pulse") else f"CH{i + 1:02d}"
            assert rb.getLabel(i) == want
            assert rb.getSampleFrequency(i) == ra.getSampleFrequency(i)
            assert np.array_equal(ra.readSignal(i, digital=True), rb.readSignal(i, digital=True))
            res = abs(ra.getPhysicalMaximum(i) - ra.getPhysicalMinimum(i)) / (
                ra.getDigitalMaximum(i) - ra.getDigitalMinimum(i)
            )
            np.testing.assert_allclose(rb.readSignal(i), ra.readSignal(i), rtol=0, atol=res)
    finally:
        ra.close()
        rb.close()
    # edfio as second independent reader
    ea, eb = read_edfio(src), read_edfio(out)
    assert [s.label for s in eb.signals] == d.meta.channels
    assert len(ea.signals) == len(eb.signals)
    for sa, sb in zip(ea.signals, eb.signals, strict=True):
        assert np.array_equal(sa.digital, sb.digital)
    assert d.meta.sampling_rates == [s.sampling_frequency for s in ea.signals]
    assert d.meta.duration == ea.duration
    assert d.report.complete


@pytest.mark.parametrize("name", ["test_generator.edf", "test_subsecond.edf", "test_utf8.edf"])
def test_annotations_timing_kept_labels_policed(name: str, tmp_path: Path) -> None:
    src = sample(name)
    out, d = deid(src, tmp_path)
    ra, rb = pyedflib.EdfReader(str(src)), pyedflib.EdfReader(str(out))
    (on_a, du_a, tx_a), (on_b, du_b, tx_b) = ra.readAnnotations(), rb.readAnnotations()
    ra.close()
    rb.close()
    assert len(tx_a) > 0
    assert np.array_equal(on_a, on_b) and np.array_equal(du_a, du_b)  # pyedflib
    expected = [t if CODES_RE.fullmatch(t) else "event" for t in tx_a]
    assert list(tx_b) == expected
    ea, eb = read_edfio(src), read_edfio(out)  # edfio reads the same timings
    assert [(x.onset, x.duration) for x in eb.annotations] == [(x.onset, x.duration) for x in ea.annotations]
    assert d.report.annotations == len(tx_a) == d.meta.annotation_count
    assert d.report.annotations_relabelled == sum(e == "event" for e in expected)
    for text in set(tx_a) - set(expected):
        assert text.encode() not in out.read_bytes()


def test_identifying_header_fields_removed(tmp_path: Path) -> None:
    src = sample("test_generator.edf")  # fills every EDF+ patient and recording subfield
    out, d = deid(src, tmp_path)
    data = out.read_bytes()
    for secret in (b"abcxyz99", b"Hans_Muller", b"30-JUN-1969", b"Dr._X", b"Mr._Spotty",
                   b"test_generator", b"unit test file", b"trans1", b"pre1",
                   b"Recording starts", b"04-APR-2011"):  # fmt: skip
        assert secret not in data
    fixed, sigs = raw_header(data)
    assert fixed["patient"] == b"X X X X".ljust(80)
    assert re.fullmatch(rb"Startdate \d\d-[A-Z]{3}-\d{4} X X X *", fixed["recording"])
    assert all(s["transducer"].strip() == s["prefilter"].strip() == b"" for s in sigs)
    hdr = pyedflib.EdfReader(str(out))  # pyedflib sees no identifiers either
    info = hdr.getHeader()
    hdr.close()
    for key in ("technician", "recording_additional", "patientcode", "equipment", "admincode",
                "birthdate", "patient_additional", "sex"):  # fmt: skip
        assert info[key] in ("", "X")
    assert info["patientname"] in ("", "X")
    names = set(d.report.fields_changed)
    assert {"patient.code", "patient.name", "patient.birthdate", "recording.technician",
            "recording.equipment", "recording.admincode", "startdate"} <= names  # fmt: skip
    assert d.identity.values["patient.name"] == "Hans_Muller"  # for the encrypted record
    assert "Hans" not in repr(d.identity) + json.dumps(d.report.as_dict()) + d.report.render()


def test_plain_edf_fields_become_x(tmp_path: Path) -> None:
    out, d = deid(sample("test_legacy.edf"), tmp_path)
    fixed, _ = raw_header(out.read_bytes())
    assert fixed["patient"] == fixed["recording"] == b"X".ljust(80)
    assert b"Legacy" not in out.read_bytes()
    assert d.meta.format == "EDF" and d.report.annotations_relabelled == 2


@pytest.mark.parametrize("name", EDF_FILES + BDF_FILES)
def test_start_date_shifted_exactly_time_kept(name: str, tmp_path: Path) -> None:
    src = sample(name)
    out, _ = deid(src, tmp_path)
    fa, _ = raw_header(src.read_bytes())
    fb, _ = raw_header(out.read_bytes())
    want = np.datetime64(header_date(fa["startdate"])) + np.timedelta64(OFFSET, "D")  # numpy
    assert np.datetime64(header_date(fb["startdate"])) == want
    assert fb["starttime"] == fa["starttime"]
    ra, rb = pyedflib.EdfReader(str(src)), pyedflib.EdfReader(str(out))
    assert rb.getStartdatetime().date() == want.astype(dt.date)  # pyedflib agrees
    assert rb.starttime_subsecond == ra.starttime_subsecond
    assert rb.getStartdatetime().time() == ra.getStartdatetime().time()
    ra.close()
    rb.close()
    ea, eb = read_edfio(src), read_edfio(out)
    assert eb.starttime == ea.starttime  # includes the sub-second start (edfio)
    assert eb.startdate == want.astype(dt.date)
    if fb["reserved"].startswith((b"EDF+", b"BDF+")):
        assert eb.recording.startdate == eb.startdate


def test_subsecond_start_survives(tmp_path: Path) -> None:
    out, _ = deid(sample("test_subsecond.edf"), tmp_path)
    assert read_edfio(out).starttime.microsecond == 394531  # pyedflib's file: +0.3945312 s


@pytest.mark.parametrize("name", EDF_FILES + BDF_FILES)
def test_output_header_fields_legal(name: str, tmp_path: Path) -> None:
    out, _ = deid(sample(name), tmp_path, opts(keep_sex=True, age_band_years=10))
    data = out.read_bytes()
    fixed, sigs = raw_header(data)
    hdr_len = int(fixed["header_bytes"])
    assert hdr_len == 256 * (len(sigs) + 1)
    start = 1 if data[0] == 0xFF else 0
    assert all(32 <= b <= 126 for b in data[start:hdr_len])  # EDF: printable US-ASCII only
    if fixed["reserved"].startswith((b"EDF+", b"BDF+")):
        subs = fixed["patient"].decode().split()
        assert len(subs) >= 4 and subs[0] == "X" and subs[2] == "X" and subs[3] == "X"
        assert subs[1] in ("F", "M", "X")
        assert not any(re.fullmatch(r"\d\d-[A-Z]{3}-\d{4}", s) for s in subs)  # no birthdate
        rec = fixed["recording"].decode().split()
        assert rec[0] == "Startdate" and rec[2:] == ["X", "X", "X"]
    for s in sigs:
        for value in s.values():
            assert value == value.rstrip().ljust(len(value))  # left-aligned, space padded


def test_keep_sex_and_age_band(tmp_path: Path) -> None:
    src = sample("test_generator.edf")
    out, d = deid(src, tmp_path, opts(keep_sex=True, age_band_years=10))
    ra = pyedflib.EdfReader(str(src))
    born = dt.datetime.strptime(ra.getBirthdate(), "%d %b %Y").date()
    start = ra.getStartdatetime().date()
    ra.close()
    age = relativedelta(start, born).years  # dateutil, independent of the module
    band = f"age_{age // 10 * 10}-{age // 10 * 10 + 9}"
    rb = pyedflib.EdfReader(str(out))
    assert rb.getSex() == "Male" and rb.getPatientAdditional() == band
    rb.close()
    assert d.report.sex_kept and d.report.age_band_written
    out2, d2 = deid(src, tmp_path)
    assert raw_header(out2.read_bytes())[0]["patient"].strip() == b"X X X X"
    assert not d2.report.sex_kept


def _tiny_edfplus(birth: dt.date, start: dt.date) -> bytes:
    edf = edfio.Edf(
        [edfio.EdfSignal(np.zeros(8), 8, label="Fz")],
        patient=edfio.Patient(birthdate=birth, sex="F"),
        recording=edfio.Recording(startdate=start),
        annotations=[],  # makes edfio write EDF+C rather than plain EDF
    )
    buf = io.BytesIO()
    edf.write(buf)
    return buf.getvalue()


@SLOW
@given(
    birth=st.dates(dt.date(1900, 1, 1), dt.date(2084, 12, 31)),
    start=st.dates(EDF_FIRST_DATE, EDF_LAST_DATE),
    width=st.integers(1, 20),
)
def test_age_band_matches_dateutil(birth: dt.date, start: dt.date, width: int) -> None:
    data = _tiny_edfplus(birth, start)  # written by edfio
    h = parse_header(data, len(data))
    res = deidentify_header(h, DeidOptions(date_offset_days=0, age_band_years=width))
    patient = res.header[8:88].decode().split()
    if birth > start:
        assert patient == ["X", "X", "X", "X"]
        return
    age = relativedelta(start, birth).years  # dateutil
    low = age // width * width
    want = "age_90+" if low >= 90 else f"age_{low}-{min(low + width - 1, 89)}"
    assert patient == ["X", "X", "X", "X", want]


@pytest.mark.parametrize("writer", ["edfio", "pyedflib"])
def test_invented_name_appears_nowhere(writer: str, tmp_path: Path) -> None:
    src = tmp_path / "named.edf"
    name, born = "Zephyrine Quillfeather", dt.date(1990, 3, 14)
    note = "Zephyrine Quillfeather 14-MAR-1990 tasted dish 4"
    labels = [(1.25, None, note), (2.0, 0.5, "stim/12"), (3.0, None, "S7"), (4.0, None, "S77x")]
    if writer == "edfio":
        edfio.Edf(
            [
                edfio.EdfSignal(
                    np.sin(np.arange(2560) / 9) * 50,
                    256,
                    label="EEG Fz",
                    transducer_type="Zephyrine cap",
                    prefiltering="Quillfeather",
                    physical_dimension="uV",
                )
            ],
            patient=edfio.Patient(
                code="ZQ-0042",
                sex="F",
                birthdate=born,
                name=name.replace(" ", "_"),
                additional=["Quillfeather"],
            ),
            recording=edfio.Recording(
                startdate=dt.date(2023, 5, 17),
                hospital_administration_code="Quillfeather",
                investigator_technician_code="Zephyrine",
                equipment_code="Zephyrine-amp",
            ),
            starttime=dt.time(9, 30, 15, 250000),
            annotations=[edfio.EdfAnnotation(*a) for a in labels],
        ).write(src)
    else:
        w = pyedflib.EdfWriter(str(src), 1, file_type=pyedflib.FILETYPE_EDFPLUS)
        w.setSignalHeaders([{"label": "EEG Fz", "dimension": "uV", "sample_frequency": 256,
                             "physical_max": 100, "physical_min": -100, "digital_max": 32767,
                             "digital_min": -32768, "transducer": "Zephyrine cap",
                             "prefilter": "Quillfeather"}])  # fmt: skip
        w.setPatientName(name.replace(" ", "_"))  # EDFlib refuses spaces in subfields
        w.setPatientCode("ZQ-0042")
        w.setBirthdate(born)
        w.setPatientAdditional("Quillfeather")
        w.setTechnician("Zephyrine")
        w.setAdmincode("Quillfeather")
        w.setEquipment("Zephyrine-amp")
        w.setRecordingAdditional("Zephyrine_Quillfeather")
        w.setStartdatetime(dt.datetime(2023, 5, 17, 9, 30, 15, 250000))
        w.writeSamples([np.sin(np.arange(2560) / 9) * 50])
        for onset, dur, text in labels:
            w.writeAnnotation(onset, -1 if dur is None else dur, text)
        w.close()
    assert b"Zephyrine" in src.read_bytes()
    out, d = deid(src, tmp_path)
    low = out.read_bytes().lower()
    for secret in (b"zephyrine", b"quillfeather", b"14-mar-1990", b"zq-0042"):
        assert secret not in low
    rb = pyedflib.EdfReader(str(out))
    texts = list(rb.readAnnotations()[2])
    rb.close()
    assert texts == ["event", "stim/12", "S7", "event"]
    assert read_edfio(out).starttime == read_edfio(src).starttime  # incl. sub-second (edfio)
    if writer == "edfio":
        assert read_edfio(out).starttime == dt.time(9, 30, 15, 250000)
    dumped = (json.dumps(d.report.as_dict()) + d.report.render() + repr(d.identity)).lower()
    assert "zephyrine" not in dumped and "quillfeather" not in dumped
    assert "Zephyrine" in " ".join(d.identity.values.values())  # handed to the steward


# --------------------------------------------------------------------------- date shift


@settings(max_examples=300)
@given(start=st.dates(EDF_FIRST_DATE, EDF_LAST_DATE), rnd=st.randoms(use_true_random=False))
def test_chosen_offset_keeps_dates_in_range(start: dt.date, rnd) -> None:
    offset = choose_date_offset(lambda n: rnd.randrange(n), start)
    shifted, clamped = shifted_date(start, offset)
    assert EDF_FIRST_DATE <= shifted <= EDF_LAST_DATE and not clamped
    assert 730 <= abs(offset) <= 30 * 365  # multi-year, bounded
    if start >= dt.date(1988, 1, 2):  # room to go back 2 years plus the 1-year margin
        assert offset < 0
    # numpy.datetime64 as independent calendar: the shift is exact
    assert np.datetime64(shifted) - np.datetime64(start) == np.timedelta64(offset, "D")


@given(start=st.dates(EDF_FIRST_DATE, EDF_LAST_DATE), offset=st.integers(-40000, 40000))
def test_shift_date_exact_or_clamped(start: dt.date, offset: int) -> None:
    want = np.datetime64(start) + np.timedelta64(offset, "D")  # numpy
    low, high = np.datetime64(EDF_FIRST_DATE), np.datetime64(EDF_LAST_DATE)
    got, clamped = shifted_date(start, offset)
    assert np.datetime64(got) == min(max(want, low), high)
    assert clamped == (not low <= want <= high)


def test_offset_from_crypto_randomness_is_uniform() -> None:
    draws = [uniform_below(6, crypto.random_bytes) for _ in range(6000)]
    counts = np.bincount(draws, minlength=6)
    assert len(counts) == 6
    assert stats.chisquare(counts).pvalue > 1e-6  # scipy.stats reference distribution
    offset = choose_date_offset(lambda n: uniform_below(n, crypto.random_bytes), dt.date(2020, 1, 1))
    assert -30 * 365 <= offset <= -730


def test_shift_out_of_range_is_clamped_and_reported(tmp_path: Path) -> None:
    # test_generator.bdf starts 01.01.2000 (pyedflib reads it so): 20 years back leaves 1985
    out, d = deid(sample("test_generator.bdf"), tmp_path, opts(offset=-(20 * 365)))
    assert raw_header(out.read_bytes())[0]["startdate"] == b"01.01.85"
    assert d.report.date_clamped and "date clamped" in d.report.render()


# --------------------------------------------------------------------------- bad input


def _check_clean(exc: BaseException, *secrets: bytes) -> None:
    assert isinstance(exc, InvalidInput)
    assert exc.__cause__ is None and (exc.__context__ is None or exc.__suppress_context__)
    assert "\n" not in str(exc)
    for s in secrets:
        assert s.decode("latin-1") not in str(exc)


def _mutate(data: bytes, offset: int, new: bytes) -> bytes:
    return data[:offset] + new + data[offset + len(new) :]


BASE = "test_subsecond.edf"  # 2 signals, header 768 bytes, records of 296 bytes


def sig_offset(name: str, index: int, n_signals: int = 2) -> int:
    """Byte offset of a signal header field (EDF specification layout, from memory)."""
    off = 256
    for field_name, width in SIGNAL_LAYOUT:
        if field_name == name:
            return off + index * width
        off += width * n_signals
    raise KeyError(name)


@pytest.mark.parametrize(
    "mutation",
    [
        lambda d: b"",
        lambda d: d[:255],
        lambda d: d[:700],
        lambda d: d[:768],
        lambda d: d[:-1],
        lambda d: d + b"\x00" * 296,
        lambda d: _mutate(d, 0, b"1       "),
        lambda d: b"\x89PNG\r\n\x1a\n" + d[8:],
        lambda d: b"This is a plain text note, not an EEG. " * 20,
        lambda d: _mutate(d, 236, b"699     "),
        lambda d: _mutate(d, 236, b"-5      "),
        lambda d: _mutate(d, 236, b"Zephyrin"),
        lambda d: _mutate(d, 8, "Zéphyrine".encode()),
        lambda d: _mutate(d, 252, b"3   "),
        lambda d: _mutate(d, 184, b"1024    "),
        lambda d: _mutate(d, 168, b"32.13.20"),
        lambda d: _mutate(d, 176, b"25.00.00"),
        lambda d: _mutate(d, 244, b"abc     "),
        lambda d: _mutate(d, 244, b"0       "),
        lambda d: _mutate(d, 192, b"EDF+Q"),
        lambda d: _mutate(d, 192, b"BDF+C"),
        lambda d: _mutate(d, 88, b"Startdate 25-JAN-2020"),
        lambda d: _mutate(d, 88, b"Startdate 24-XYZ-2020"),
        lambda d: _mutate(d, sig_offset("dmin", 0), b"32767   "),  # digital min == max
        lambda d: _mutate(d, sig_offset("pmin", 0), b"-8711   "),  # physical min == max
        lambda d: _mutate(d, sig_offset("spr", 0), b"0       "),  # 0 samples per record
        lambda d: _mutate(d, sig_offset("dmax", 1), b"99999   "),  # beyond 16 bits
        lambda d: _mutate(d, sig_offset("label", 0), b"EDF Annotations "),  # data as TALs
        lambda d: d[:768] + b"\xff" * (len(d) - 768),  # annotations become garbage
    ],
)
def test_malformed_files_refused(mutation, tmp_path: Path) -> None:
    bad = tmp_path / "bad.edf"
    bad.write_bytes(mutation(sample(BASE).read_bytes()))
    with pytest.raises(VaultError) as info:
        d = deidentified_blocks(bad, opts())
        for _ in d.blocks:
            pass
    _check_clean(info.value, b"Zephyrin", "Zéphyrine".encode())


@pytest.mark.parametrize(
    ("record", "patch"),
    [
        (5, b"+5.3945312\x15\x14\x14\x00"),
        (7, b"+7.3945312A\x14\x14\x00"),
        (9, b"oops"),
        (11, b"+11.3945312\x14\x14\x00junk\x00"),
    ],
)
def test_broken_tal_mid_file_aborts_stream(record: int, patch: bytes, tmp_path: Path) -> None:
    data = sample(BASE).read_bytes()
    area = 768 + record * 296 + 256  # annotation signal: last 40 bytes of each record
    bad = tmp_path / "tal.edf"
    bad.write_bytes(_mutate(data, area, patch.ljust(40, b"\x00")))
    d = deidentified_blocks(bad, opts(), block_bytes=296)
    received = []
    with pytest.raises(InvalidInput, match=f"data record {record}") as info:
        received.extend(d.blocks)
    _check_clean(info.value)
    assert len(received) == record and not d.report.complete  # consumer must discard


@settings(SLOW, max_examples=40)
@given(cut=st.integers(0, 207375))
def test_truncated_anywhere_refused(cut: int, tmp_path: Path) -> None:
    bad = tmp_path / "cut.edf"
    bad.write_bytes(sample(BASE).read_bytes()[:cut])
    with pytest.raises(InvalidInput) as info:
        deidentified_blocks(bad, opts())
    _check_clean(info.value)


def test_missing_file_is_not_found(tmp_path: Path) -> None:
    with pytest.raises(NotFound):
        deidentified_blocks(tmp_path / "absent.edf", opts())


# --------------------------------------------------------------------------- fuzzing

_VALID = None


def _valid_header() -> tuple[bytes, int]:
    global _VALID
    if _VALID is None:
        src = sample(BASE)
        _VALID = (src.read_bytes()[:768], src.stat().st_size)
    return _VALID


FIELD_STARTS = [0, 8, 88, 168, 176, 184, 192, 236, 244, 252, *list(range(256, 768, 8))]


@settings(max_examples=400, deadline=None)
@given(
    start=st.sampled_from(FIELD_STARTS),
    junk=st.one_of(
        st.binary(min_size=1, max_size=16),
        st.text(st.characters(min_codepoint=32, max_codepoint=126), min_size=1, max_size=16).map(str.encode),
    ),
    size_delta=st.sampled_from([0, 0, 0, -1, 296, -296]),
)
def test_fuzz_mutated_headers(start: int, junk: bytes, size_delta: int) -> None:
    header, size = _valid_header()
    data = _mutate(header, start, junk)[:768]
    try:
        h = parse_header(data, size + size_delta)
        res = deidentify_header(h, opts())
    except InvalidInput:
        return
    again = parse_header(res.header, size + size_delta)  # the output is always a valid header
    assert again.record_bytes == h.record_bytes and again.n_records == h.n_records


@settings(max_examples=300, deadline=None)
@given(data=st.binary(max_size=1200), size=st.integers(0, 1 << 20))
def test_fuzz_random_headers(data: bytes, size: int) -> None:
    with contextlib.suppress(InvalidInput):
        read_header(io.BytesIO(data), size)


@settings(max_examples=300, deadline=None)
@given(area=st.binary(max_size=120), time_keeping=st.booleans())
def test_fuzz_annotation_bytes(area: bytes, time_keeping: bool) -> None:
    try:
        out = rewrite_annotations(area, CODES.matches, b"event", time_keeping=time_keeping,
                                  where="fuzz", counts=AnnotationCounts())  # fmt: skip
    except InvalidInput:
        return
    assert len(out) == len(area)


_LABEL = st.one_of(st.from_regex(r"S\d{1,3}", fullmatch=True), st.text(
    st.characters(blacklist_characters="\x14\x15", blacklist_categories=["Cs", "Cc"]),
    min_size=1, max_size=12))  # fmt: skip
_TAL = st.tuples(st.integers(0, 10**6), st.integers(0, 9999), st.one_of(st.none(),
                 st.integers(0, 9999)), st.lists(_LABEL, min_size=1, max_size=3))  # fmt: skip


@settings(max_examples=200, deadline=None)
@given(tals=st.lists(_TAL, max_size=5), spare=st.integers(0, 30))
def test_rewritten_tals_parse_identically_in_edfio(tals, spare: int) -> None:
    parts = [b"+12.5\x14\x14\x00"]
    for sec, frac, dur, texts in tals:
        timing = f"+{sec}.{frac:04}" + ("" if dur is None else f"\x15{dur}.5")
        parts.append((timing + "\x14" + "".join(t + "\x14" for t in texts) + "\x00").encode())
    raw = b"".join(parts)
    area = raw + b"\x00" * spare
    counts = AnnotationCounts()
    out = rewrite_annotations(area, CODES.matches, b"event", time_keeping=True, where="t",
                              counts=counts)  # fmt: skip
    assert len(out) == len(area)
    before = _EdfAnnotationsDataRecord.from_bytes(area).annotations  # edfio's TAL parser
    after = _EdfAnnotationsDataRecord.from_bytes(out).annotations
    assert [(a.onset, a.duration) for a in after] == [(a.onset, a.duration) for a in before]
    short = counts.short_label_records == 1
    for a, b in zip(before, after, strict=True):
        kept = a.text == "" or CODES_RE.fullmatch(a.text)
        assert b.text == (a.text if kept else ("X" if short else "event"))
    assert out.startswith(b"+12.5\x14\x14\x00")  # time-keeping TAL byte-exact


def test_short_neutral_label_fallback() -> None:
    area = b"+0\x14\x14\x00+1\x14ab\x14\x00\x00"
    counts = AnnotationCounts()
    out = rewrite_annotations(area, lambda _t: False, b"neutral-event", time_keeping=True,
                              where="t", counts=counts)  # fmt: skip
    assert out == b"+0\x14\x14\x00+1\x14X\x14\x00\x00\x00"
    assert counts.short_label_records == 1 and counts.relabelled == 1


# --------------------------------------------------------------------------- streaming


def test_block_size_does_not_change_output(tmp_path: Path) -> None:
    src = sample("test_utf8.edf")
    one = deidentified_blocks(src, opts(), block_bytes=1)  # one record per block
    blocks = list(one.blocks)
    assert len(blocks) == one.meta.n_records
    big = deidentified_blocks(src, opts(), block_bytes=1 << 20)
    assert one.header + b"".join(blocks) == big.header + b"".join(big.blocks)


def test_streaming_memory_bounded(tmp_path: Path) -> None:
    src = tmp_path / "long.edf"
    size = write_test_edf(src, duration_s=480, n_channels=64, rate=1000)  # ~62 MB
    tracemalloc.start()
    d = deidentified_blocks(src, opts(), block_bytes=1 << 20)
    total = len(d.header)
    for block in d.blocks:
        total += len(block)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert total == size and d.report.complete
    assert peak < 12 * 1024 * 1024 < size / 4  # a few blocks, never the file
    assert d.report.annotations_relabelled == 5  # the bench file's free-text notes


def test_bench_file_readable_after_deid(tmp_path: Path) -> None:
    src = tmp_path / "bench.edf"
    write_test_edf(src, duration_s=120, n_channels=4, rate=250)
    out, _ = deid(src, tmp_path)
    rb = pyedflib.EdfReader(str(out))  # pyedflib
    texts = list(rb.readAnnotations()[2])
    assert rb.getSampleFrequency(0) == 250 and rb.getFileDuration() == 120
    rb.close()
    assert texts.count("event") == 1 and texts.count("stim/3") == 2


# --------------------------------------------------------------------------- NumPy input


def _side(tmp: Path, **doc: object) -> Path:
    path = tmp / "side.json"
    path.write_text(json.dumps(doc))
    return path


def _write_stream(d, path: Path) -> Path:
    path.write_bytes(d.header + b"".join(d.blocks))
    return path


def test_npy_channels_first_to_edf(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    x = rng.normal(0, 40, (3, 2600)) + np.array([[0], [500], [-20]])
    np.save(tmp_path / "x.npy", x)
    side = _side(tmp_path, sampling_rate=250, channel_names=["Fz", "Cz", "Pz"], units="uV",
                 start_date="2022-06-01", start_time="13:45:10")  # fmt: skip
    d = npy_deidentified_blocks(tmp_path / "x.npy", side, opts(), block_bytes=4096)
    out = _write_stream(d, tmp_path / "x.edf")
    r = pyedflib.EdfReader(str(out))  # pyedflib reads what we wrote
    try:
        assert r.getSignalLabels() == ["Fz", "Cz", "Pz"]
        assert r.getPhysicalDimension(1) == "uV" and r.getSampleFrequency(0) == 250
        want = dt.datetime(2022, 6, 1, 13, 45, 10) + dt.timedelta(days=OFFSET)
        assert r.getStartdatetime() == want
        for i in range(3):
            res = (r.getPhysicalMaximum(i) - r.getPhysicalMinimum(i)) / 65535
            got = r.readSignal(i)
            assert len(got) == 2750 and d.meta.padding_samples == 150
            np.testing.assert_allclose(got[:2600], x[i], rtol=0, atol=res * 0.51 + 1e-9)
    finally:
        r.close()
    e = read_edfio(out)  # edfio too
    assert e.num_data_records == 11 and [s.label for s in e.signals] == ["Fz", "Cz", "Pz"]
    assert d.report.date_shift_applied and d.report.complete


def test_npz_samples_first_fractional_rate(tmp_path: Path) -> None:
    x = (np.arange(1028 * 2).reshape(1028, 2) % 300 - 150).astype(np.int16)
    np.savez_compressed(tmp_path / "x.npz", eeg=x)
    side = _side(tmp_path, sampling_rate=128.5, channel_names=["O1", "O2"], units=["uV", "uV"],
                 layout="samples_first")  # fmt: skip
    out = _write_stream(npy_deidentified_blocks(tmp_path / "x.npz", side, opts()),
                        tmp_path / "x.edf")  # fmt: skip
    r = pyedflib.EdfReader(str(out))  # pyedflib
    assert r.getSampleFrequency(0) == 128.5 and r.datarecord_duration == 2
    np.testing.assert_allclose(r.readSignal(1)[:1028], x[:, 1], atol=300 / 65535)
    r.close()
    assert raw_header(out.read_bytes())[0]["startdate"] == b"01.01.85"  # placeholder
    with pytest.raises(edfio.AnonymizedDateError):  # edfio reads EDF+ "Startdate X"
        _ = read_edfio(out).startdate


@pytest.mark.parametrize(
    ("array", "doc"),
    [
        (np.zeros((2, 100)), {"channel_names": ["A", "B", "C"]}),
        (np.zeros((2, 100)), {"sampling_rate": "fast"}),
        (np.zeros((2, 100)), {"sampling_rate": -1}),
        (np.zeros((2, 100)), {"patient_name": "Zephyrine"}),
        (np.zeros((2, 100)), {"start_date": "2022-02-30"}),
        (np.zeros((2, 100)), {"units": ["uV"]}),
        (np.zeros((2, 100)), {"channel_names": ["EDF Annotations", "B"]}),
        (np.zeros((2, 100)), {"sampling_rate": 1 / 3}),
        (np.zeros((2, 2, 100)), {}),
        (np.zeros((2, 100), dtype=complex), {}),
        (np.array([[1.0, np.nan], [0.0, 1.0]]), {}),
        (np.full((2, 100), 1e9), {}),
        (np.array([[{"name": "Zephyrine"}, 1]], dtype=object), {}),
    ],
)
def test_bad_numpy_input_refused(array: np.ndarray, doc: dict, tmp_path: Path) -> None:
    np.save(tmp_path / "a.npy", array, allow_pickle=True)
    full = {"sampling_rate": 100, "channel_names": ["A", "B"], "units": "uV", **doc}
    with pytest.raises(InvalidInput) as info:
        d = npy_deidentified_blocks(tmp_path / "a.npy", _side(tmp_path, **full), opts())
        list(d.blocks)
    _check_clean(info.value, b"Zephyrine")


@pytest.mark.parametrize("kind", ["pickle", "truncated", "not-json", "two-members", "empty"])
def test_bad_numpy_files_refused(kind: str, tmp_path: Path) -> None:
    arr = tmp_path / "a.npy"
    side = _side(tmp_path, sampling_rate=100, channel_names=["A", "B"], units="uV")
    np.save(arr, np.zeros((2, 1000)))
    if kind == "pickle":
        arr.write_bytes(pickle.dumps({"who": "Zephyrine"}))
    elif kind == "truncated":
        arr.write_bytes(arr.read_bytes()[:900])
    elif kind == "not-json":
        side.write_bytes(b"\xff{not json")
    elif kind == "two-members":
        arr = tmp_path / "a.npz"
        np.savez(arr, a=np.zeros((2, 10)), b=np.zeros((2, 10)))
    else:
        arr.write_bytes(b"")
    with pytest.raises(InvalidInput) as info:
        npy_deidentified_blocks(arr, side, opts())
    _check_clean(info.value, b"Zephyrine")


# --------------------------------------------------------------------------- labels, units, dates

PYEDFLIB_ROOT = Path(pyedflib.__file__).parent
SHIPPED = sorted({*(PYEDFLIB_ROOT / "tests" / "data").glob("*.[eb]df"),
                  *(PYEDFLIB_ROOT / "data").glob("*.[eb]df")})  # every EDF/BDF in the wheel


def test_free_text_labels_and_units_are_replaced(tmp_path: Path) -> None:
    src = tmp_path / "labels.edf"
    signals = [edfio.EdfSignal(np.zeros(256), 256, label=label, physical_dimension=unit)
               for label, unit in (("Fz Jane Roe", "uV"), ("EEG Cz-REF", "Roe"), ("ECG", "mV"))]
    edfio.Edf(signals, annotations=[]).write(src)  # written by edfio
    out, d = deid(src, tmp_path)
    assert b"Jane Roe" in src.read_bytes() and b"Jane" not in out.read_bytes()
    e = read_edfio(out)  # edfio reads the replaced header
    assert [s.label for s in e.signals] == ["CH01", "EEG Cz-REF", "ECG"] == d.meta.channels
    assert [s.physical_dimension for s in e.signals] == ["uV", "", "mV"] == d.meta.units
    assert (d.report.labels_replaced, d.report.units_replaced) == (1, 1)
    assert {"signal 0 label", "signal 1 dimension"} <= set(d.report.fields_changed)
    shown = json.dumps(d.report.as_dict()) + d.report.render() + repr(d.identity)
    assert "Jane" not in shown and "Roe" not in shown
    assert d.identity.values["signal 0 label"] == "Fz Jane Roe"  # only for the encrypted record


@pytest.mark.parametrize("offset", [-40000, -9000, 0, 9000, 40000])
@pytest.mark.parametrize("src", SHIPPED, ids=lambda p: f"{p.parent.name}/{p.name}")
def test_every_shipped_file_deidentifies_at_any_offset(src: Path, offset: int, tmp_path: Path) -> None:
    out, d = deid(src, tmp_path, opts(offset=offset))  # never refused for its date
    with pyedflib.EdfReader(str(src)) as ra, pyedflib.EdfReader(str(out)) as rb:  # pyedflib
        start = ra.getStartdatetime().date()
        got = rb.getStartdatetime().date()
    want = np.datetime64(start) + np.timedelta64(offset, "D")  # numpy's calendar
    low, high = np.datetime64(EDF_FIRST_DATE), np.datetime64(EDF_LAST_DATE)
    assert np.datetime64(got) == min(max(want, low), high)
    assert d.report.date_clamped == (not low <= want <= high)
    assert ("date clamped" in d.report.render()) == d.report.date_clamped


def test_repeated_labels_are_made_unique(tmp_path: Path) -> None:
    src = tmp_path / "twice.edf"
    signals = [edfio.EdfSignal(np.zeros(256), 256, label=label) for label in ("Fz", "FZ", "Cz", "Fz")]
    edfio.Edf(signals, annotations=[]).write(src)  # edfio writes the repeats as given
    _, d = deid(src, tmp_path)
    assert d.meta.channels == ["Fz", "CH02", "Cz", "CH04"]  # unique within the file (BIDS rows)


def test_the_export_polices_files_stored_before_labels_were_policed(tmp_path: Path) -> None:
    from vault.formats.edf_header import with_known_channels

    src = tmp_path / "old.edf"
    edfio.Edf([edfio.EdfSignal(np.zeros(256), 256, label="Fz Jane Roe", physical_dimension="Roe"),
               edfio.EdfSignal(np.zeros(256), 256, label="Cz", physical_dimension="uV")],
              annotations=[]).write(src)  # edfio: as an older vault stored it, labels verbatim
    data = src.read_bytes()
    h = parse_header(data, len(data))
    out = with_known_channels(data[: h.header_bytes], h) + data[h.header_bytes :]
    e = read_edfio_bytes(out, tmp_path)  # edfio reads the policed copy
    assert [(s.label, s.physical_dimension) for s in e.signals] == [("CH01", ""), ("Cz", "uV")]
    assert out[h.header_bytes :] == data[h.header_bytes :] and len(out) == len(data)


def read_edfio_bytes(data: bytes, tmp: Path):
    path = tmp / "policed.edf"
    path.write_bytes(data)
    return read_edfio(path)
