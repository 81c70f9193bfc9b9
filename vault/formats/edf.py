"""De-identified, streamed EDF / EDF+ / BDF (and NumPy converted to EDF+).

`deidentified_blocks(path, options)` returns the de-identified header, an
iterator of data-record blocks (about `block_bytes` each), the report and the
recording's metadata. Nothing is stored or encrypted here: the encrypted store
consumes the blocks. The file is validated before the first block and while
streaming; an `InvalidInput` raised by the iterator means the consumer must
discard everything it received (nothing half-stored).

Data records pass through byte-exact except the annotation signals, whose
labels are rewritten in place (same record size; onsets, durations and each
record's time-keeping onset are kept byte-exact, so sub-second starts survive).

De-identification removes what the EDF header and annotations can name; it does
not make a recording anonymous (EEG itself can identify a person). Whether the
result may be shared is for the local ethics board, data-protection officer
and law to decide.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import math
import os
import re
import zipfile
from collections.abc import Callable, Iterator
from dataclasses import asdict, dataclass
from decimal import ROUND_CEILING, ROUND_FLOOR, Decimal
from pathlib import Path
from typing import Any, BinaryIO, NamedTuple, Protocol

import numpy as np

from vault.errors import InvalidInput, NotFound, UsageError
from vault.formats import strictjson
from vault.formats.channels import is_known_label, is_known_unit, neutral_label
from vault.formats.edf_header import (
    BLOCK,
    DeidOptions,
    EdfHeader,
    RemovedIdentity,
    SupportsRead,
    date_or_none,
    deidentify_header,
    edf_date,
    header_from,
    pack_header,
    parse_header,
    plus_date,
    read_exactly,
    read_header,
    shifted_date,
)
from vault.formats.edf_header import field as header_field

__all__ = [
    "CAUTION", "AnnotationCounts", "DeidOptions", "DeidReport", "Deidentified", "RecordingMeta",
    "RemovedIdentity", "deidentified_blocks", "deidentified_stream", "npy_deidentified_blocks",
    "read_stream_header", "recording_meta",
    "rewrite_annotations",
]  # fmt: skip

DEFAULT_BLOCK_BYTES = 1 << 20
CAUTION = (
    "De-identification removed header identifiers and free-text labels; the signals "
    "themselves can still identify a person. Ask your ethics board and data-protection "
    "officer before sharing."
)


@dataclass
class DeidReport:
    """What was changed: field names and counts only, never values."""

    fields_changed: list[str]
    date_shift_applied: bool
    sex_kept: bool = False
    age_band_written: bool = False
    date_clamped: bool = False  # the shifted date fell outside 1985-2084 and was clamped
    labels_replaced: int = 0  # signal labels that were not known channel names
    units_replaced: int = 0  # physical dimensions that were not known units
    annotations: int = 0
    annotations_relabelled: int = 0
    records_with_short_neutral_label: int = 0
    complete: bool = False  # True once the block iterator has run to the end

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)

    def render(self) -> str:
        lines = [
            "de-identification report" + ("" if self.complete else " (INCOMPLETE)"),
            f"  header fields changed: {', '.join(self.fields_changed) or 'none'}",
            f"  signal labels replaced: {self.labels_replaced}, units blanked: {self.units_replaced}",
            f"  annotations: {self.annotations}, relabelled as neutral: {self.annotations_relabelled}",
            f"  start date shifted by the participant's offset: {'yes' if self.date_shift_applied else 'no'}"
            + (" (date clamped to EDF's 1985-2084 window)" if self.date_clamped else ""),
            f"  caution: {CAUTION}",
        ]
        return "\n".join(lines)


@dataclass
class RecordingMeta:
    """What policies and exports need; nothing identifying."""

    format: str
    channels: list[str]
    units: list[str]
    sampling_rates: list[float]
    samples_per_record: list[int]
    n_samples: list[int]
    n_records: int
    record_duration: float
    duration: float
    bytes_per_sample: int
    padding_samples: int = 0  # NumPy input: samples added to fill the last record
    annotation_count: int | None = None  # known once the blocks were streamed
    stored_bytes: int = 0

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def recording_meta(h: EdfHeader) -> RecordingMeta:
    """The metadata of a parsed (de-identified) header: what the BIDS writer needs."""
    ordinary = [s for s in h.signals if not s.is_annotation]
    duration = float(h.record_duration)
    return RecordingMeta(
        format=h.format_name,
        channels=[s.label for s in ordinary],
        units=[s.raw["dimension"].decode("ascii").rstrip() for s in ordinary],
        sampling_rates=[float(s.samples_per_record / h.record_duration) for s in ordinary],
        samples_per_record=[s.samples_per_record for s in ordinary],
        n_samples=[s.samples_per_record * h.n_records for s in ordinary],
        n_records=h.n_records,
        record_duration=duration,
        duration=duration * h.n_records,
        bytes_per_sample=h.bytes_per_sample,
        stored_bytes=h.header_bytes + h.n_records * h.record_bytes,
    )


# --------------------------------------------------------------------------- annotations

_ONSET = re.compile(rb"[+-][0-9]+(?:\.[0-9]+)?")
_DURATION = re.compile(rb"[0-9]+(?:\.[0-9]+)?")


@dataclass
class AnnotationCounts:
    annotations: int = 0
    relabelled: int = 0
    short_label_records: int = 0


def _bad_tal(where: str, why: str) -> InvalidInput:
    return InvalidInput(f"not a valid EDF+ file: annotations in {where} {why}")


def rewrite_annotations(
    area: bytes,
    keep: Callable[[str], bool],
    neutral: bytes,
    *,
    time_keeping: bool,
    where: str,
    counts: AnnotationCounts,
) -> bytes:
    """One annotation signal's bytes of one record, labels policed, same length.

    TALs (EDF+ specification section 2.2): onset [0x15 duration] 0x14, then texts
    each ended by 0x14, then 0x00; the rest of the signal is 0x00. `time_keeping`:
    the first TAL must be the record's time-keeping TAL (first text empty).
    """
    tals: list[tuple[bytes, list[bytes]]] = []
    pos, n = 0, len(area)
    while pos < n and area[pos] != 0:
        end = area.find(b"\x00", pos)
        if end < 0:
            raise _bad_tal(where, "end without a 0x00 terminator")
        parts = area[pos:end].split(b"\x14")
        if len(parts) < 3 or parts[-1] != b"":
            raise _bad_tal(where, "hold a TAL without a 0x14-terminated text")
        onset, _, duration = parts[0].partition(b"\x15")
        if not _ONSET.fullmatch(onset) or (b"\x15" in parts[0] and not _DURATION.fullmatch(duration)):
            raise _bad_tal(where, "hold a malformed onset or duration")
        tals.append((parts[0], parts[1:-1]))
        pos = end + 1
    if area.count(0, pos) != n - pos:
        raise _bad_tal(where, "carry bytes after the last TAL")
    if time_keeping and (not tals or tals[0][1][0] != b""):
        raise _bad_tal(where, "lack the record's time-keeping TAL")
    policed: list[tuple[bytes, list[bytes | None]]] = []
    changed = False
    for timing, texts in tals:
        new: list[bytes | None] = []
        for text in texts:
            if text:
                counts.annotations += 1
                try:
                    ok = keep(text.decode("utf-8"))
                except UnicodeDecodeError:
                    ok = False
                if not ok:
                    counts.relabelled += 1
                    changed = True
                    new.append(None)  # None: becomes the neutral label below
                    continue
            new.append(text)
        policed.append((timing, new))
    if not changed:
        return area
    for label in (neutral, b"X"):  # "X" fits wherever the original label did
        out = b"".join(
            t + b"\x14" + b"".join((label if x is None else x) + b"\x14" for x in texts) + b"\x00"
            for t, texts in policed
        )
        if len(out) <= n:
            counts.short_label_records += label != neutral
            return out.ljust(n, b"\x00")
    raise _bad_tal(where, "cannot be relabelled within the record")  # pragma: no cover


# --------------------------------------------------------------------------- EDF streaming


class Deidentified(NamedTuple):
    """Header bytes, then the blocks: their concatenation is the de-identified file.

    `report` and `meta` are final once `blocks` is exhausted. `identity` holds the
    removed originals (plaintext: only for the encrypted identity record).
    """

    header: bytes
    blocks: Iterator[bytes]
    report: DeidReport
    meta: RecordingMeta
    identity: RemovedIdentity


def _open(path: Path, what: str) -> BinaryIO:
    try:
        return path.open("rb")
    except FileNotFoundError:
        raise NotFound(f"{what} file not found") from None
    except OSError:
        raise InvalidInput(f"{what} file cannot be read") from None


def _keeper(opts: DeidOptions) -> Callable[[str], bool]:
    codes = opts.event_codes
    if codes is None:
        return lambda _text: False
    return codes.matches


def deidentified_blocks(
    path: str | os.PathLike[str], options: DeidOptions, block_bytes: int = DEFAULT_BLOCK_BYTES,
    observe: Callable[[bytes], None] | None = None,
) -> Deidentified:
    """Validate the header now; stream the de-identified data records lazily.

    `observe`, if given, sees every byte of the input file as read, in order (for a
    content digest of exactly what was de-identified).
    """
    path = Path(path)
    with _open(path, "recording") as f:
        size = os.fstat(f.fileno()).st_size
        header, raw = read_header(f, size)
    return _deidentified(header, raw, size, _FileRecords(path, size, raw), options, block_bytes,
                         observe)


def deidentified_stream(
    header: EdfHeader, raw_header: bytes, read: Callable[[int], bytes], size: int,
    options: DeidOptions, block_bytes: int = DEFAULT_BLOCK_BYTES,
    observe: Callable[[bytes], None] | None = None,
) -> Deidentified:
    """As `deidentified_blocks`, for a sequential reader whose first `raw_header` bytes were
    read and parsed already (`read_header(stream, size)`, `size` the announced length): the
    records are read from `read` as the blocks are consumed, and a stream that ends early,
    sends more than `size` bytes or fails to read raises `InvalidInput` from the iterator."""
    return _deidentified(header, raw_header, size, _StreamRecords(read), options, block_bytes,
                         observe)


def _deidentified(
    header: EdfHeader, raw: bytes, size: int, source: _Records, options: DeidOptions,
    block_bytes: int, observe: Callable[[bytes], None] | None,
) -> Deidentified:
    deid = deidentify_header(header, options)
    report = DeidReport(
        list(deid.changed),
        date_shift_applied=deid.date_known and options.date_offset_days != 0,
        date_clamped=deid.date_clamped,
        sex_kept=deid.sex_kept,
        age_band_written=deid.age_band_written,
        labels_replaced=deid.labels_replaced,
        units_replaced=deid.units_replaced,
    )
    meta = recording_meta(parse_header(deid.header, size))  # what is stored, not the input
    blocks = _edf_blocks(source, raw, header, options, block_bytes, report, meta, observe)
    return Deidentified(deid.header, blocks, report, meta, deid.identity)


class _Records(Protocol):
    """Where the data records come from: `opened()` gives a reader positioned after the
    header, `finish(read)` checks the end. Messages name the source, never a value."""

    truncated: str

    def opened(self) -> contextlib.AbstractContextManager[Callable[[int], bytes]]: ...

    def finish(self, read: Callable[[int], bytes]) -> None: ...


class _FileRecords:
    truncated = "recording file was truncated while it was being read"

    def __init__(self, path: Path, size: int, raw_header: bytes) -> None:
        self.path, self.size, self.raw_header = path, size, raw_header

    @contextlib.contextmanager
    def opened(self) -> Iterator[Callable[[int], bytes]]:
        with _open(self.path, "recording") as f:
            if os.fstat(f.fileno()).st_size != self.size or f.read(len(self.raw_header)) != self.raw_header:
                raise InvalidInput("recording file changed while it was being read")
            yield f.read

    def finish(self, read: Callable[[int], bytes]) -> None:
        return None  # the size was checked when the file was opened


class _StreamRecords:
    truncated = "recording stream ended before its announced size; nothing was stored"

    def __init__(self, read: Callable[[int], bytes]) -> None:
        self.read = read

    def opened(self) -> contextlib.AbstractContextManager[Callable[[int], bytes]]:
        return contextlib.nullcontext(self.read)

    def finish(self, read: Callable[[int], bytes]) -> None:
        if read(1):
            raise InvalidInput("recording stream sent more bytes than its announced size; "
                               "nothing was stored")


def stream_reader(stream: SupportsRead) -> Callable[[int], bytes]:
    """`stream.read` with a failing read (a dropped connection) as `InvalidInput`."""

    def read(n: int) -> bytes:
        try:
            data = stream.read(n)
        except OSError:
            raise InvalidInput("recording stream failed while it was being read; "
                               "nothing was stored") from None
        if not isinstance(data, bytes | bytearray | memoryview) or len(data) > n:
            raise InvalidInput("recording stream returned something other than the bytes asked for")
        return bytes(data)

    return read


def read_stream_header(stream: SupportsRead, size: int) -> tuple[EdfHeader, bytes, Callable[[int], bytes]]:
    """Read and validate the header at a sequential stream's start against its announced
    `size` (header plus every data record, exactly); returns the parsed header, its raw
    bytes and the reader to hand to `deidentified_stream`."""
    if isinstance(size, bool) or not isinstance(size, int) or size < 0:
        raise UsageError("the announced size must be a byte count (a non-negative integer)")
    read = stream_reader(stream)
    header, raw = header_from(read, size)
    return header, raw, read


def _edf_blocks(
    source: _Records,
    raw_header: bytes,
    h: EdfHeader,
    opts: DeidOptions,
    block_bytes: int,
    report: DeidReport,
    meta: RecordingMeta,
    observe: Callable[[bytes], None] | None,
) -> Iterator[bytes]:
    keep, neutral = _keeper(opts), opts.neutral_label.encode("ascii")
    seen = observe or (lambda _data: None)
    rec = h.record_bytes
    per_block = max(1, block_bytes // rec)
    areas: list[tuple[int, int, bool]] = []  # annotation signals: start, stop, time-keeping
    offset = 0
    for s in h.signals:
        width = s.samples_per_record * h.bytes_per_sample
        if s.is_annotation:
            areas.append((offset, offset + width, h.is_plus and not areas))
        offset += width
    counts = AnnotationCounts()
    with source.opened() as read:
        seen(raw_header)
        done = 0
        while done < h.n_records:
            k = min(per_block, h.n_records - done)
            data = read_exactly(read, k * rec)
            if len(data) != k * rec:
                raise InvalidInput(source.truncated)
            seen(data)
            if areas:
                buf: bytearray | None = None
                for r in range(k):
                    base = r * rec
                    for start, stop, time_keeping in areas:
                        area = data[base + start : base + stop]
                        new = rewrite_annotations(
                            area, keep, neutral, time_keeping=time_keeping,
                            where=f"data record {done + r}", counts=counts,
                        )  # fmt: skip
                        if new is not area:
                            buf = bytearray(data) if buf is None else buf
                            buf[base + start : base + stop] = new
                data = data if buf is None else bytes(buf)
                report.annotations = counts.annotations
                report.annotations_relabelled = counts.relabelled
                report.records_with_short_neutral_label = counts.short_label_records
            yield data
            done += k
        source.finish(read)
    meta.annotation_count = counts.annotations
    report.complete = True


# --------------------------------------------------------------------------- NumPy input

_SIDECAR_KEYS = frozenset(
    {"sampling_rate", "channel_names", "units", "layout", "start_date", "start_time", "array"}
)
_DURATIONS = tuple(Decimal(d) for d in ("1", "2", "4", "5", "10", "0.5", "0.25", "0.2", "0.1",
                                        "0.125", "0.05", "0.04", "0.02", "0.01"))  # fmt: skip
MAX_NPZ_BYTES = 256 * 1024 * 1024  # .npz members are loaded whole; larger ones: use .npy
_ISO_DATE = re.compile(r"([0-9]{4})-([0-9]{2})-([0-9]{2})")
_ISO_TIME = re.compile(r"([01][0-9]|2[0-3]):([0-5][0-9]):([0-5][0-9])")


def _text_list(value: object, key: str, width: int, n: int | None) -> list[str]:
    items = value if isinstance(value, list) else None
    if items is None or (n is not None and len(items) != n) or not items:
        raise InvalidInput(f"sidecar {key} must be a non-empty list matching the channels")
    for item in items:
        ok = isinstance(item, str) and len(item) <= width and item.isascii()
        if not ok or not item.isprintable() or item.strip() == "EDF Annotations":
            raise InvalidInput(f"sidecar {key} entries must be printable ASCII, <= {width} chars")
    return items


def _sidecar(path: Path) -> dict[str, Any]:
    with _open(path, "sidecar") as f:
        data = f.read((1 << 20) + 1)
    try:
        doc = strictjson.loads(data)
    except ValueError:  # includes UnicodeDecodeError and duplicate keys
        raise InvalidInput("sidecar is not valid strict JSON (or larger than 1 MiB)") from None
    if not isinstance(doc, dict):
        raise InvalidInput("sidecar must be a JSON object")
    if not set(doc) <= _SIDECAR_KEYS:
        raise InvalidInput(f"sidecar holds keys other than {', '.join(sorted(_SIDECAR_KEYS))}")
    rate = doc.get("sampling_rate")
    if isinstance(rate, bool) or not isinstance(rate, int | float):
        raise InvalidInput("sidecar sampling_rate must be a number")
    if not (math.isfinite(rate) and 0 < rate <= 1e6):
        raise InvalidInput("sidecar sampling_rate must be positive and at most 1 MHz")
    doc["channel_names"] = _text_list(doc.get("channel_names"), "channel_names", 16, None)
    n = len(doc["channel_names"])
    units = doc.get("units")
    doc["units"] = _text_list([units] * n if isinstance(units, str) else units, "units", 8, n)
    if doc.setdefault("layout", "channels_first") not in ("channels_first", "samples_first"):
        raise InvalidInput("sidecar layout must be channels_first or samples_first")
    date, time = doc.get("start_date"), doc.setdefault("start_time", "00:00:00")
    d = _ISO_DATE.fullmatch(date) if isinstance(date, str) else None
    if date is not None and (d is None or (day := _valid_date(d)) is None):
        raise InvalidInput("sidecar start_date must be a valid YYYY-MM-DD date")
    doc["start_date"] = day if date is not None else None
    if not isinstance(time, str) or not _ISO_TIME.fullmatch(time):
        raise InvalidInput("sidecar start_time must be HH:MM:SS")
    if "array" in doc and not (isinstance(doc["array"], str) and doc["array"].isidentifier()):
        raise InvalidInput("sidecar array must name an .npz member")
    return doc


def _valid_date(m: re.Match[str]) -> dt.date | None:
    return date_or_none(int(m[3]), int(m[2]), int(m[1]))


def _check_array(arr: object) -> np.ndarray:
    if not isinstance(arr, np.ndarray) or arr.dtype.kind not in "iuf" or arr.dtype.itemsize > 8:
        raise InvalidInput("array must hold integers or floats (no objects, no pickles)")
    if arr.ndim != 2 or 0 in arr.shape:
        raise InvalidInput("array must be two-dimensional and non-empty")
    return arr


def _load_array(path: Path, member: str | None) -> np.ndarray:
    with _open(path, "array") as f:
        magic = f.read(6)
    try:
        if magic == b"\x93NUMPY":
            return _check_array(np.load(path, mmap_mode="r", allow_pickle=False))
        if magic[:4] != b"PK\x03\x04":
            raise InvalidInput("array file is neither .npy nor .npz")
        with zipfile.ZipFile(path) as zf:
            names = [n for n in zf.namelist() if n.endswith(".npy")]
            name = f"{member}.npy" if member else (names[0] if len(names) == 1 else None)
            if name is None or name not in names:
                raise InvalidInput("npz must hold one array, or the sidecar must name it")
            with zf.open(name) as fp:
                version = np.lib.format.read_magic(fp)
                reader = {(1, 0): np.lib.format.read_array_header_1_0,
                          (2, 0): np.lib.format.read_array_header_2_0}.get(version)  # fmt: skip
                if reader is None:
                    raise InvalidInput("npz member has an unsupported .npy version")
                shape, _, dtype = reader(fp)
                if dtype.hasobject or math.prod(shape) * dtype.itemsize > MAX_NPZ_BYTES:
                    raise InvalidInput("npz member holds objects or exceeds 256 MiB (use .npy)")
            with zf.open(name) as fp:
                return _check_array(np.lib.format.read_array(fp, allow_pickle=False))
    except (ValueError, OSError, EOFError, zipfile.BadZipFile, KeyError):
        raise InvalidInput("array file is unreadable (truncated, pickled or malformed)") from None


def _fit8(value: float, rounding: str) -> str:
    """The shortest <= 8-character decimal at or beyond `value` in the rounding direction."""
    exact = Decimal(value)
    for places in range(7, -1, -1):
        text = format(exact.quantize(Decimal(1).scaleb(-places), rounding=rounding), "f")
        text = text.rstrip("0").rstrip(".") if "." in text else text
        text = "0" if text == "-0" else text
        if len(text) <= 8:
            return text
    raise InvalidInput("channel values exceed what EDF's 8-character range fields hold")


def _record_duration(rate: float, n_channels: int) -> tuple[Decimal, int]:
    fs = Decimal(repr(rate))
    for d in _DURATIONS:
        spr = fs * d
        if spr == spr.to_integral_value() and spr >= 1 and n_channels * spr * 2 <= 1 << 24:
            return d, int(spr)
    raise InvalidInput("sampling_rate needs a data-record duration EDF cannot express")


def _onset(k: int, d: Decimal) -> str:
    return "+" + format((Decimal(k) * d).normalize(), "f")


def npy_deidentified_blocks(
    array_path: str | os.PathLike[str],
    sidecar_path: str | os.PathLike[str],
    options: DeidOptions,
    block_bytes: int = DEFAULT_BLOCK_BYTES,
) -> Deidentified:
    """A NumPy array plus its JSON sidecar as a de-identified 16-bit EDF+C stream.

    Sidecar keys: sampling_rate (Hz), channel_names (<= 16 chars), units (one string
    or one per channel, <= 8 chars), optional layout (channels_first | samples_first),
    start_date (YYYY-MM-DD, shifted by the participant's offset; without it EDF+'s
    "Startdate X" and the placeholder 01.01.85), start_time (HH:MM:SS) and array
    (.npz member). Physical ranges come from each channel's minimum and maximum; the
    last record is padded with the digital value nearest physical 0.
    """
    side = _sidecar(Path(sidecar_path))
    arr = _load_array(Path(array_path), side.get("array"))
    if side["layout"] == "samples_first":
        arr = arr.T
    given_names, given_units = side["channel_names"], side["units"]
    names: list[str] = []
    for i, name in enumerate(given_names):  # as vault.formats.edf_header.policed_channels: known, once
        known = is_known_label(name) and name.casefold() not in {n.casefold() for n in names}
        names.append(name if known else neutral_label(i + 1))
    units = [u if is_known_unit(u) else "" for u in given_units]
    if arr.shape[0] != len(names):
        raise InvalidInput("array channel count differs from the sidecar's channel_names")
    n_ch, n_samples = arr.shape
    d, spr = _record_duration(side["sampling_rate"], n_ch)
    n_records = -(-n_samples // spr)
    if n_ch > 9998 or n_records > 99_999_999:
        raise InvalidInput("array has more channels or records than EDF's header can count")
    step = max(1, block_bytes // (8 * n_ch))
    lo = np.full(n_ch, np.inf)
    hi = np.full(n_ch, -np.inf)
    for s0 in range(0, n_samples, step):
        chunk = np.asarray(arr[:, s0 : s0 + step], dtype=np.float64)
        if not np.isfinite(chunk).all():
            raise InvalidInput("array holds NaN or infinite values")
        lo, hi = np.minimum(lo, chunk.min(axis=1)), np.maximum(hi, chunk.max(axis=1))
    if max(np.abs(lo).max(), np.abs(hi).max()) >= 1e7:
        raise InvalidInput("channel values exceed what EDF's 8-character range fields hold")
    wide = hi == lo
    pmin = [_fit8(v, ROUND_FLOOR) for v in np.where(wide, lo - 1, lo)]
    pmax = [_fit8(v, ROUND_CEILING) for v in np.where(wide, hi + 1, hi)]
    start = side["start_date"]
    shifted, clamped = shifted_date(start, options.date_offset_days) if start else (None, False)
    last_onset = _onset(n_records - 1, d)
    ann_bytes = -(-(len(last_onset) + 3) // 2) * 2
    blank = header_field("", 80, "text")

    def signal(label: str, unit: str, p0: str, p1: str, n: int) -> dict[str, bytes]:
        return {"label": header_field(label, 16, "label"), "transducer": blank,
                "dimension": header_field(unit, 8, "dimension"),
                "physical_min": header_field(p0, 8, "physical_min"),
                "physical_max": header_field(p1, 8, "physical_max"),
                "digital_min": header_field("-32768", 8, "digital_min"),
                "digital_max": header_field("32767", 8, "digital_max"), "prefilter": blank,
                "samples_per_record": header_field(str(n), 8, "samples_per_record"),
                "reserved": blank[:32]}  # fmt: skip

    signals = [signal(names[i], units[i], pmin[i], pmax[i], spr) for i in range(n_ch)]
    signals.append(signal("EDF Annotations", "", "-1", "1", ann_bytes // 2))
    plus = plus_date(shifted) if shifted else "X"
    fixed = {
        "version": b"0       ", "patient": header_field("X X X X", 80, "patient"),
        "recording": header_field(f"Startdate {plus} X X X", 80, "recording"),
        "startdate": header_field(edf_date(shifted) if shifted else "01.01.85", 8, "startdate"),
        "starttime": header_field(side["start_time"].replace(":", "."), 8, "starttime"),
        "header_bytes": header_field(str(BLOCK * (n_ch + 2)), 8, "header_bytes"),
        "reserved": header_field("EDF+C", 44, "reserved"),
        "n_records": header_field(str(n_records), 8, "n_records"),
        "record_duration": header_field(format(d.normalize(), "f"), 8, "record_duration"),
        "n_signals": header_field(str(n_ch + 1), 4, "n_signals"),
    }  # fmt: skip
    header = pack_header(fixed, signals)
    applied = shifted is not None and options.date_offset_days != 0
    changed = [f"signal {i} {what}" for i in range(n_ch)
               for what, old, new in (("label", given_names, names), ("dimension", given_units, units))
               if old[i] != new[i]]  # fmt: skip
    report = DeidReport(changed + (["startdate"] if applied else []), date_shift_applied=applied,
                        date_clamped=clamped,
                        labels_replaced=sum(a != b for a, b in zip(given_names, names, strict=True)),
                        units_replaced=sum(a != b for a, b in zip(given_units, units, strict=True)))
    meta = RecordingMeta(
        format="EDF+C", channels=list(names), units=list(units),
        sampling_rates=[float(side["sampling_rate"])] * n_ch, samples_per_record=[spr] * n_ch,
        n_samples=[spr * n_records] * n_ch, n_records=n_records, record_duration=float(d),
        duration=float(d * n_records), bytes_per_sample=2,
        padding_samples=spr * n_records - n_samples,
        stored_bytes=len(header) + n_records * (n_ch * spr * 2 + ann_bytes),
    )  # fmt: skip
    p0 = np.array([float(v) for v in pmin])[:, None]
    p1 = np.array([float(v) for v in pmax])[:, None]
    blocks = _npy_blocks(arr, p0, p1, spr, n_records, d, ann_bytes, block_bytes, report, meta)
    return Deidentified(header, blocks, report, meta, RemovedIdentity({}, start))


def _npy_blocks(
    arr: np.ndarray,
    p0: np.ndarray,
    p1: np.ndarray,
    spr: int,
    n_records: int,
    d: Decimal,
    ann_bytes: int,
    block_bytes: int,
    report: DeidReport,
    meta: RecordingMeta,
) -> Iterator[bytes]:
    n_ch = arr.shape[0]
    sig_bytes = n_ch * spr * 2
    per_block = max(1, block_bytes // (sig_bytes + ann_bytes))
    scale = 65535.0 / (p1 - p0)
    pad = np.clip(np.rint((0.0 - p0) * scale - 32768), -32768, 32767)
    for r0 in range(0, n_records, per_block):
        k = min(per_block, n_records - r0)
        x = np.asarray(arr[:, r0 * spr : (r0 + k) * spr], dtype=np.float64)
        if not np.isfinite(x).all():
            raise InvalidInput("array changed while it was being read (NaN or infinite)")
        digital = np.clip(np.rint((x - p0) * scale - 32768), -32768, 32767)
        if digital.shape[1] < k * spr:
            fill = np.broadcast_to(pad, (n_ch, k * spr - digital.shape[1]))
            digital = np.concatenate([digital, fill], axis=1)
        samples = digital.astype("<i2").reshape(n_ch, k, spr).transpose(1, 0, 2)
        out = np.zeros((k, sig_bytes + ann_bytes), dtype=np.uint8)
        out[:, :sig_bytes] = np.ascontiguousarray(samples).view(np.uint8).reshape(k, sig_bytes)
        for r in range(k):
            tal = (_onset(r0 + r, d) + "\x14\x14").encode("ascii")
            out[r, sig_bytes : sig_bytes + len(tal)] = np.frombuffer(tal, dtype=np.uint8)
        yield out.tobytes()
    meta.annotation_count = 0
    report.complete = True
