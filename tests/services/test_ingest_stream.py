"""Streamed ingest (an upload): the same stored recording as the file path gives, nothing
stored for a stream that misbehaves, memory bounded for an hour of 64 channels.

Independent readers: pyedflib (EDFlib) and MNE read what the door hands back.
"""

from __future__ import annotations

import io
import shutil
import tracemalloc
from collections.abc import Iterator
from pathlib import Path

import mne
import numpy as np
import pyedflib
import pytest

from tests.clock import ManualClock, at
from tests.conftest import ROOT, TEST_PASSPHRASE, assert_absent
from tests.formats.test_edf_stream import Breaks, Trickle
from tests.services.test_ingest import ENTERED, NOW, PYEDFLIB_DATA, _form, _read_back, _snapshot
from vault import InvalidInput, PolicyRefusal, UsageError, Vault
from vault.formats.edf_header import BLOCK, field, pack_header

FILES = ["test_generator.edf", "test_generator.bdf", "test_subsecond.edf", "test_utf8.edf"]
ANALYST = "analyst passphrase long enough"
FORM = (ROOT / "docs" / "examples" / "consent-all-granted.toml").read_bytes()


@pytest.fixture
def lab(fresh_vault: Vault) -> tuple[Vault, dict[str, str]]:
    pids = {name: at(fresh_vault, ENTERED if name == "expired" else NOW).enrol(
                _form(f"consent-{name}.toml", name))["participant_id"]
            for name in ("all-granted", "expired")}
    return fresh_vault, pids


def Upload(data: bytes, seed: int = 1) -> Trickle:
    """A sequential reader over bytes, returning uneven short reads as a socket does."""
    return Trickle(data, seed, most=65536)


def _one_sample_changed(data: bytes) -> tuple[bytes, int]:
    """The same recording with the first sample's low byte flipped (signal 0 is not annotations
    in pyedflib's files): a different content, the same header."""
    header_bytes = int(data[184:192])
    changed = bytearray(data)
    changed[header_bytes] ^= 0x01
    return bytes(changed), header_bytes


@pytest.mark.parametrize("name", FILES)
def test_stream_and_path_store_the_same_recording(lab, tmp_path: Path, name: str) -> None:
    v, pids = lab
    pid = pids["all-granted"]
    source = PYEDFLIB_DATA / name
    data = source.read_bytes()
    other, at_byte = _one_sample_changed(data)
    other_path = tmp_path / ("other" + source.suffix)
    other_path.write_bytes(other)

    by_path = at(v, NOW).ingest_eeg(pid, source)
    by_stream = at(v, NOW).ingest_eeg_stream(pid, Upload(other), len(other), name=name)
    assert not by_path["already_stored"] and not by_stream["already_stored"]
    assert {k: x for k, x in by_path.items() if k != "blob_id"} == \
        {k: x for k, x in by_stream.items() if k != "blob_id"}
    # the content tag is the same whichever way a content arrives
    again = at(v, NOW).ingest_eeg_stream(pid, Upload(data, seed=9), len(data), name=name)
    assert again["already_stored"] and again["blob_id"] == by_path["blob_id"]
    assert at(v, NOW).ingest_eeg(pid, other_path)["blob_id"] == by_stream["blob_id"]

    a = _read_back(v, by_path["blob_id"], tmp_path).read_bytes()
    b = _read_back(v, by_stream["blob_id"], tmp_path).read_bytes()
    assert len(a) == len(b) and a != b
    diff = [i for i, (x, y) in enumerate(zip(a, b, strict=True)) if x != y]
    assert diff == [at_byte]  # byte-identical but for the one sample the inputs differ in


@pytest.mark.parametrize("name", FILES)
def test_independent_readers_open_the_streamed_recording(lab, tmp_path: Path, name: str) -> None:
    v, pids = lab
    source = PYEDFLIB_DATA / name
    data = source.read_bytes()
    result = at(v, NOW).ingest_eeg_stream(pids["all-granted"], Upload(data), len(data), name=name)
    back = _read_back(v, result["blob_id"], tmp_path)
    stored = back.with_suffix(source.suffix)
    back.rename(stored)
    # pyedflib (EDFlib): digital samples identical to the source's, identity gone
    with pyedflib.EdfReader(str(source)) as a, pyedflib.EdfReader(str(stored)) as b:
        assert a.signals_in_file == b.signals_in_file
        for i in range(a.signals_in_file):
            np.testing.assert_array_equal(a.readSignal(i, digital=True), b.readSignal(i, digital=True))
        assert b.getPatientName() in ("", "X")
        assert a.getStartdatetime().time() == b.getStartdatetime().time()
    # MNE reads the same physical signals from source and stored file
    reader = mne.io.read_raw_bdf if source.suffix == ".bdf" else mne.io.read_raw_edf
    ra = reader(source, preload=True, verbose="error")
    rb = reader(stored, preload=True, verbose="error")
    assert ra.info["sfreq"] == rb.info["sfreq"] and len(ra.ch_names) == len(rb.ch_names)
    np.testing.assert_array_equal(ra.get_data(), rb.get_data())


def _bad_streams(data: bytes) -> dict[str, tuple[object, int]]:
    annotated = bytearray(data)
    annotated[768 + 9 * 296 + 256 : 768 + 9 * 296 + 260] = b"oops"  # record 9's annotations
    return {
        "empty": (Upload(b""), 0),
        "ends-early": (Upload(data[:-1000]), len(data)),
        "ends-in-header": (Upload(data[:500]), len(data)),
        "more-than-announced": (Upload(data + b"\x00" * 5000), len(data)),
        "announced-short": (Upload(data), len(data) - 296),
        "announced-long": (Upload(data), len(data) + 296),
        "connection-drops": (Breaks(data, 100_000, ConnectionResetError("gone")), len(data)),
        "annotations-broken-mid-way": (Upload(bytes(annotated)), len(data)),
        "not-edf": (Upload(b"%PDF-1.7 " * 1000), 9000),
    }


@pytest.mark.parametrize("case", list(_bad_streams(b"x" * 30_000)))
def test_a_misbehaving_stream_stores_nothing(lab, case: str) -> None:
    v, pids = lab
    data = (PYEDFLIB_DATA / "test_subsecond.edf").read_bytes()  # header 768, records 296
    stream, size = _bad_streams(data)[case]
    audited = v._audit.size
    before = _snapshot(v.path)
    with pytest.raises(InvalidInput) as info:
        at(v, NOW).ingest_eeg_stream(pids["all-granted"], stream, size)
    assert "Zephyrin" not in str(info.value) and str(size) not in str(info.value)
    assert _snapshot(v.path) == before  # no blob file, no row
    assert not list((v.path / "tmp").iterdir())  # no partial ciphertext either
    assert v._audit.size == audited  # no "done" entry


def test_an_error_the_stream_raises_propagates_and_stores_nothing(lab) -> None:
    v, pids = lab
    data = (PYEDFLIB_DATA / "test_generator.edf").read_bytes()
    before = _snapshot(v.path)
    with pytest.raises(KeyboardInterrupt):
        at(v, NOW).ingest_eeg_stream(pids["all-granted"], Breaks(data, 50_000, KeyboardInterrupt()),
                                     len(data))
    assert _snapshot(v.path) == before
    assert not list((v.path / "tmp").iterdir())


def test_an_analyst_is_refused_before_the_stream_is_read(vault_path: Path) -> None:
    clock = ManualClock(NOW)
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=clock) as v:
        pid = v.enrol(FORM)["participant_id"]
        v.add_member("omar", "analyst", ANALYST)
    data = (PYEDFLIB_DATA / "test_generator.edf").read_bytes()
    upload = Upload(data)
    with Vault.open(vault_path, ANALYST, member="omar", clock=clock) as a, \
            pytest.raises(PolicyRefusal, match="stewards only"):
        a.ingest_eeg_stream(pid, upload, len(data))
    assert upload.calls == 0  # not one byte of the upload was read
    with Vault.open(vault_path, TEST_PASSPHRASE, clock=clock) as v:
        last = v.audit_entries()[-1]
        assert [b for b in v.blobs() if b["kind"] == "eeg-raw"] == []
    assert (last["actor"], last["action"], last["decision"]) == ("omar", "ingest.eeg", "refuse")


def test_no_consent_for_storage_is_refused_before_the_stream_is_read(lab) -> None:
    v, pids = lab
    data = (PYEDFLIB_DATA / "test_generator.edf").read_bytes()
    upload = Upload(data)
    with pytest.raises(PolicyRefusal, match="no current consent"):
        at(v, NOW).ingest_eeg_stream(pids["expired"], upload, len(data))
    assert upload.calls == 0


@pytest.mark.parametrize(("kwargs", "message"), [({"size": -5}, "announced size"),
                                                 ({"size": "12"}, "announced size"),
                                                 ({"name": "array.npy"}, "EDF, EDF\\+ or BDF")])
def test_bad_arguments_are_usage_errors(lab, kwargs: dict, message: str) -> None:
    v, pids = lab
    data = (PYEDFLIB_DATA / "test_generator.edf").read_bytes()
    args = {"size": len(data), **kwargs}
    with pytest.raises(UsageError, match=message):
        at(v, NOW).ingest_eeg_stream(pids["all-granted"], io.BytesIO(data), **args)


# --------------------------------------------------------------------------- memory

CHANNELS, RATE, SECONDS = 64, 4096, 3600  # an hour of 64 channels at 4096 Hz: about 1.9 GB


class Generated:
    """An EDF+C recording made as it is read (never whole, never on disk): 64 channels of
    invented samples, a time-keeping annotation per one-second record."""

    def __init__(self) -> None:
        blank = field("", 80, "text")

        def signal(label: str, unit: str, lo: str, hi: str, n: int) -> dict[str, bytes]:
            return {"label": field(label, 16, "l"), "transducer": blank,
                    "dimension": field(unit, 8, "d"), "physical_min": field(lo, 8, "p"),
                    "physical_max": field(hi, 8, "p"), "digital_min": field("-32768", 8, "d"),
                    "digital_max": field("32767", 8, "d"), "prefilter": blank,
                    "samples_per_record": field(str(n), 8, "n"), "reserved": blank[:32]}

        signals = [signal(f"EEG{i:03}", "uV", "-3276.8", "3276.7", RATE) for i in range(CHANNELS)]
        signals.append(signal("EDF Annotations", "", "-1", "1", 16))
        fixed = {"version": b"0       ", "patient": field("X F 01-JAN-1990 Invented_Person", 80, "p"),
                 "recording": field("Startdate 02-MAR-2021 X X X", 80, "r"),
                 "startdate": field("02.03.21", 8, "d"), "starttime": field("10.15.00", 8, "t"),
                 "header_bytes": field(str(BLOCK * (CHANNELS + 2)), 8, "h"),
                 "reserved": field("EDF+C", 44, "r"), "n_records": field(str(SECONDS), 8, "n"),
                 "record_duration": field("1", 8, "d"), "n_signals": field(str(CHANNELS + 1), 4, "n")}
        rng = np.random.default_rng(3)
        self.samples = [rng.integers(-2000, 2000, CHANNELS * RATE, dtype="<i2").tobytes()
                        for _ in range(4)]
        self.size = BLOCK * (CHANNELS + 2) + SECONDS * (CHANNELS * RATE * 2 + 32)
        self._parts = self._make(pack_header(fixed, signals))
        self._pending = b""

    def _make(self, header: bytes) -> Iterator[bytes]:
        yield header
        for k in range(SECONDS):
            yield self.samples[k % 4] + f"+{k}\x14\x14\x00".encode().ljust(32, b"\x00")

    def read(self, n: int) -> bytes:
        while len(self._pending) < n:
            part = next(self._parts, None)
            if part is None:
                break
            self._pending += part
        out, self._pending = self._pending[:n], self._pending[n:]
        return out


def test_an_hour_of_64_channels_streams_in_bounded_memory(vault_path: Path) -> None:
    v = Vault.init(vault_path, TEST_PASSPHRASE)
    try:
        pid = at(v, NOW).enrol(FORM)["participant_id"]
        upload = Generated()
        tracemalloc.start()
        result = at(v, NOW).ingest_eeg_stream(pid, upload, upload.size)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        assert result["recording"]["n_records"] == SECONDS and not result["already_stored"]
        stored = sum(p.stat().st_size for p in (vault_path / "blobs").rglob("*") if p.is_file())
        assert stored > upload.size  # every byte went through, as ciphertext
        # a whole-recording read would hold >= 1.9 GB; the stream holds a block or two
        assert peak < 16 * 1024 * 1024 < upload.size / 100, peak
        print(f"streamed {upload.size / 1e9:.2f} GB, peak Python allocation {peak / 2**20:.1f} MiB")
    finally:
        v.close()
        shutil.rmtree(vault_path / "blobs", ignore_errors=True)  # a GB of test ciphertext


# --------------------------------------------------------------------------- scores as bytes


def _scores(rows: list[tuple[str, str, str]]) -> bytes:
    return ("participant_id,item_id,value\n" + "".join(f"{p},{i},{x}\n" for p, i, x in rows)).encode()


def test_scores_bytes_and_scores_file_are_one_ingest(lab, tmp_path: Path) -> None:
    v, pids = lab
    pid = pids["all-granted"]
    data = _scores([(pid, "dish-01", "3"), (pid, "dish-02", "0")])
    first = at(v, NOW).ingest_scores_bytes(data, "explicit", name="ratings.csv")
    assert first["batches_stored"] == 1 and first["rows"] == 2
    path = tmp_path / "ratings.csv"
    path.write_bytes(data)
    again = at(v, NOW).ingest_scores(path, "explicit")  # the same rows from a file: already there
    assert again["batches_stored"] == 0 and again["batches_already_stored"] == 1
    with pytest.raises(InvalidInput, match=r"row 2: .*already has"):
        at(v, NOW).ingest_scores_bytes(_scores([(pid, "dish-01", "1")]), "explicit")
    assert_absent(v.path, b"dish-01", b"dish-02")  # item ids only inside ciphertext
    assert not list((v.path / "tmp").iterdir())


@pytest.mark.parametrize(("data", "message"), [
    (b"\xff\xfe not utf-8", "not UTF-8"), (b"pid,item,value\nx,y,1\n", "row 1"),
    (b"participant_id,item_id,value\n" + b"0" * 32 + b",dish-01,1\n", "row 2: unknown"),
])
def test_bad_score_bytes_store_nothing(lab, data: bytes, message: str) -> None:
    v, _ = lab
    before = _snapshot(v.path)
    with pytest.raises(InvalidInput, match=message):
        at(v, NOW).ingest_scores_bytes(data, "explicit")
    assert _snapshot(v.path) == before


@pytest.mark.parametrize(("args", "message"), [(("a text, not bytes", "explicit"), "must be bytes"),
                                               ((b"", "explicit", "scores.xlsx"), "a CSV file"),
                                               ((b"", "neither"), "'derived' or 'explicit'")])
def test_score_bytes_usage_errors(lab, args: tuple, message: str) -> None:
    v, _ = lab
    data, kind, *name = args
    with pytest.raises(UsageError, match=message):
        at(v, NOW).ingest_scores_bytes(data, kind, **({"name": name[0]} if name else {}))


def test_an_analyst_may_not_upload_scores(vault_path: Path) -> None:
    clock = ManualClock(NOW)
    with Vault.init(vault_path, TEST_PASSPHRASE, clock=clock) as v:
        pid = v.enrol(FORM)["participant_id"]
        v.add_member("omar", "analyst", ANALYST)
    with Vault.open(vault_path, ANALYST, member="omar", clock=clock) as a, \
            pytest.raises(PolicyRefusal, match="stewards only"):
        a.ingest_scores_bytes(_scores([(pid, "dish-01", "1")]), "explicit")
    with Vault.open(vault_path, TEST_PASSPHRASE, clock=clock) as v:
        last = v.audit_entries()[-1]
        assert [b for b in v.blobs() if b["kind"] == "ratings-explicit"] == []
    assert (last["actor"], last["action"], last["decision"]) == ("omar", "ingest.scores", "refuse")
