"""Strict reader and writer of the EDF / EDF+ / BDF header, and its de-identification.

The header is 256 bytes plus 256 per signal, every field fixed-width,
space-padded, printable US-ASCII (EDF and EDF+ specifications; BDF differs only
in its version field, byte 0xFF + "BIOSEMI", and 24-bit samples). Nothing here
touches data records: `vault.formats.edf` streams those.

Error messages name a field or an offset, never a value read from the file.
"""

from __future__ import annotations

import calendar
import datetime as dt
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from decimal import Decimal
from typing import Protocol

from vault.errors import InvalidInput, UsageError
from vault.formats.channels import is_known_label, is_known_unit, neutral_label
from vault.policy.event_codes import EventCodes

FIXED_FIELDS: tuple[tuple[str, int], ...] = (
    ("version", 8), ("patient", 80), ("recording", 80), ("startdate", 8), ("starttime", 8),
    ("header_bytes", 8), ("reserved", 44), ("n_records", 8), ("record_duration", 8),
    ("n_signals", 4),
)  # fmt: skip
SIGNAL_FIELDS: tuple[tuple[str, int], ...] = (
    ("label", 16), ("transducer", 80), ("dimension", 8), ("physical_min", 8),
    ("physical_max", 8), ("digital_min", 8), ("digital_max", 8), ("prefilter", 80),
    ("samples_per_record", 8), ("reserved", 32),
)  # fmt: skip
BLOCK = 256
EDF_VERSION = b"0       "
BDF_VERSION = b"\xffBIOSEMI"
ANNOTATION_LABELS = (b"EDF Annotations", b"BDF Annotations")
MAX_RECORD_BYTES = 64 * 1024 * 1024  # one data record must fit the streaming memory bound
# EDF's two-digit year: 85..99 -> 19yy, 00..84 -> 20yy (EDF specification).
EDF_FIRST_DATE = dt.date(1985, 1, 1)
EDF_LAST_DATE = dt.date(2084, 12, 31)
MONTHS = ("JAN", "FEB", "MAR", "APR", "MAY", "JUN", "JUL", "AUG", "SEP", "OCT", "NOV", "DEC")

_NOT_PRINTABLE = re.compile(rb"[^\x20-\x7e]")
_INT = re.compile(rb"[+-]?[0-9]{1,8}")
_FLOAT = re.compile(rb"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]{1,2})?")
_DATE = re.compile(rb"([0-9]{2})\.([0-9]{2})\.([0-9]{2})")
_PLUS_DATE = re.compile(r"([0-9]{2})-([A-Za-z]{3})-([0-9]{4})")
_AGE_BAND = re.compile(r"age_(?:[0-9]{1,2}-[0-9]{1,2}|90\+)")  # as `_age_band` writes them

# Kept verbatim only when they match these strict forms (common practice, no source:
# the EDF+ specification's examples "AgAgCl electrode" and "HP:0.1Hz LP:75Hz N:50Hz").
TRANSDUCER_PATTERN = re.compile(
    r"(?:(?:Ag-?AgCl|Ag/AgCl|AgCl|Au|Ag|Sn|Pt|gold|silver|tin|active|passive|dry|gel|sponge)"
    r"(?: (?:cup|disk|disc|ring|needle|cap))? )?electrode",
    re.IGNORECASE,
)
_FILTER_ITEM = r"(?:HP|LP|N):(?:[0-9]{1,5}(?:\.[0-9]{1,4})?(?:Hz|kHz)|DC|none|off)"
PREFILTER_PATTERN = re.compile(rf"{_FILTER_ITEM}(?: {_FILTER_ITEM})*")


@dataclass(frozen=True)
class SignalHeader:
    index: int
    raw: Mapping[str, bytes]
    samples_per_record: int
    is_annotation: bool

    @property
    def label(self) -> str:
        return self.raw["label"].decode("ascii").rstrip()

    @property
    def unit(self) -> str:
        return self.raw["dimension"].decode("ascii").rstrip()


@dataclass(frozen=True)
class EdfHeader:
    raw: Mapping[str, bytes]
    signals: tuple[SignalHeader, ...]
    is_bdf: bool
    variant: str  # "", "+C" or "+D"
    start_date: dt.date
    n_records: int
    record_duration: Decimal
    header_bytes: int

    @property
    def is_plus(self) -> bool:
        return bool(self.variant)

    @property
    def bytes_per_sample(self) -> int:
        return 3 if self.is_bdf else 2

    @property
    def record_bytes(self) -> int:
        return sum(s.samples_per_record for s in self.signals) * self.bytes_per_sample

    @property
    def format_name(self) -> str:
        return ("BDF" if self.is_bdf else "EDF") + self.variant


def _bad(where: str, why: str) -> InvalidInput:
    return InvalidInput(f"not a valid EDF/BDF file: {where} {why}")


def _int(raw: bytes, where: str) -> int:
    text = raw.strip(b" ")
    if not _INT.fullmatch(text):
        raise _bad(where, "is not an integer")
    return int(text)


def _number(raw: bytes, where: str) -> Decimal:
    text = raw.strip(b" ")
    if not _FLOAT.fullmatch(text):
        raise _bad(where, "is not a number")
    return Decimal(text.decode("ascii"))


def _split(data: bytes, layout: Sequence[tuple[str, int]]) -> dict[str, bytes]:
    out: dict[str, bytes] = {}
    pos = 0
    for name, width in layout:
        out[name] = data[pos : pos + width]
        pos += width
    return out


def _check_ascii(data: bytes, start: int, offset: int) -> None:
    bad = _NOT_PRINTABLE.search(data, start)
    if bad:
        raise _bad(f"header byte at offset {offset + bad.start()}", "is not printable ASCII")


def date_or_none(day: int, month: int, year: int) -> dt.date | None:
    if not (1 <= month <= 12 and 1 <= year <= 9999):
        return None
    if not 1 <= day <= calendar.monthrange(year, month)[1]:
        return None
    return dt.date(year, month, day)


def parse_fixed(first: bytes, file_size: int) -> tuple[dict[str, bytes], int, int]:
    """Check the first 256 bytes; return (fields, n_signals, header_bytes)."""
    if file_size == 0 or not first:
        raise InvalidInput("not a valid EDF/BDF file: the file is empty")
    if len(first) < BLOCK or file_size < BLOCK:
        raise _bad("header", "is truncated (shorter than 256 bytes)")
    version = first[:8]
    if version not in (EDF_VERSION, BDF_VERSION):
        raise _bad("version field (offset 0)", "is neither EDF '0' nor BDF 0xFF 'BIOSEMI'")
    _check_ascii(first[:BLOCK], 1 if version == BDF_VERSION else 0, 0)
    fields = _split(first[:BLOCK], FIXED_FIELDS)
    n_signals = _int(fields["n_signals"], "number-of-signals field (offset 252)")
    if not 1 <= n_signals <= 9999:
        raise _bad("number-of-signals field (offset 252)", "is out of range")
    header_bytes = _int(fields["header_bytes"], "header-size field (offset 184)")
    if header_bytes != BLOCK * (n_signals + 1):
        raise _bad("header-size field (offset 184)", "disagrees with the number of signals")
    if file_size < header_bytes:
        raise _bad("header", "is truncated (file shorter than its declared header)")
    return fields, n_signals, header_bytes


def _variant(reserved: bytes, is_bdf: bool) -> tuple[str, bool]:
    """('+C' | '+D' | '', keep_reserved) from the 44-byte reserved field."""
    text = reserved.rstrip(b" ")
    own, other = (b"BDF+", b"EDF+") if is_bdf else (b"EDF+", b"BDF+")
    if text.startswith(other):
        raise _bad("reserved field (offset 192)", "names the other format")
    if text.startswith(own):
        if text[4:] not in (b"C", b"D"):
            raise _bad("reserved field (offset 192)", "is neither +C nor +D")
        return "+" + text[4:].decode("ascii"), True
    return "", is_bdf and text == b"24BIT"


def parse_header(data: bytes, file_size: int) -> EdfHeader:
    """Parse and validate a complete header (`data` holds at least all of it)."""
    fields, n_signals, header_bytes = parse_fixed(data[:BLOCK], file_size)
    if len(data) < header_bytes:
        raise _bad("signal headers", "are truncated")
    _check_ascii(data[:header_bytes], BLOCK, 0)
    is_bdf = fields["version"] == BDF_VERSION
    variant, _ = _variant(fields["reserved"], is_bdf)
    m = _DATE.fullmatch(fields["startdate"])
    start = None
    if m:
        day, month, yy = (int(g) for g in m.groups())
        start = date_or_none(day, month, yy + (1900 if yy >= 85 else 2000))
    if start is None:
        raise _bad("startdate field (offset 168)", "is not a valid dd.mm.yy date")
    t = _DATE.fullmatch(fields["starttime"])
    if not t or int(t[1]) > 23 or int(t[2]) > 59 or int(t[3]) > 59:
        raise _bad("starttime field (offset 176)", "is not a valid hh.mm.ss time")
    duration = _number(fields["record_duration"], "record-duration field (offset 244)")
    columns: dict[str, list[bytes]] = {}
    pos = BLOCK
    for name, width in SIGNAL_FIELDS:
        columns[name] = [data[pos + i * width : pos + (i + 1) * width] for i in range(n_signals)]
        pos += width * n_signals
    signals = tuple(_parse_signal(i, columns, is_bdf) for i in range(n_signals))
    if duration < 0 or (duration == 0 and not all(s.is_annotation for s in signals)):
        raise _bad("record-duration field (offset 244)", "must be positive")
    record_bytes = sum(s.samples_per_record for s in signals) * (3 if is_bdf else 2)
    if record_bytes > MAX_RECORD_BYTES:
        raise _bad("signal headers", "declare a data record larger than 64 MiB")
    n_records = _int(fields["n_records"], "number-of-records field (offset 236)")
    body = file_size - header_bytes
    if n_records == -1 and body % record_bytes == 0:  # -1: "unknown" while recording
        n_records = body // record_bytes
    if not 1 <= n_records <= 99_999_999:
        raise _bad("number-of-records field (offset 236)", "is not a positive 8-digit count")
    if body != n_records * record_bytes:
        what = "shorter" if body < n_records * record_bytes else "longer"
        raise _bad("data records", f"are {what} than the number-of-records field (offset 236) "
                   "declares (truncated or padded)")
    return EdfHeader(fields, signals, is_bdf, variant, start, n_records, duration, header_bytes)


def _parse_signal(i: int, columns: Mapping[str, list[bytes]], is_bdf: bool) -> SignalHeader:
    raw = {name: column[i] for name, column in columns.items()}
    where = f"signal {i}"
    spr = _int(raw["samples_per_record"], f"{where} samples-per-record field")
    if spr < 1:
        raise _bad(f"{where} samples-per-record field", "must be positive")
    dmin = _int(raw["digital_min"], f"{where} digital-minimum field")
    dmax = _int(raw["digital_max"], f"{where} digital-maximum field")
    limit = 1 << (23 if is_bdf else 15)
    if not -limit <= dmin < dmax < limit:
        raise _bad(f"{where} digital range", "is empty or exceeds the sample width")
    pmin = _number(raw["physical_min"], f"{where} physical-minimum field")
    pmax = _number(raw["physical_max"], f"{where} physical-maximum field")
    if pmin == pmax:
        raise _bad(f"{where} physical range", "is empty")
    is_annotation = raw["label"].rstrip(b" ") in ANNOTATION_LABELS
    return SignalHeader(i, raw, spr, is_annotation)


def read_exactly(read: Callable[[int], bytes], n: int) -> bytes:
    """`n` bytes from a sequential reader that may return fewer per call; fewer only at its end."""
    data = read(n)
    if len(data) == n or not data:
        return data
    parts = bytearray(data)
    while len(parts) < n and (more := read(n - len(parts))):
        parts += more
    return bytes(parts)


class SupportsRead(Protocol):
    """A sequential reader: `.read(n)` returns up to `n` bytes, b"" at the end (no seek)."""

    def read(self, n: int, /) -> bytes: ...


def read_header(stream: SupportsRead, file_size: int) -> tuple[EdfHeader, bytes]:
    """Read and parse the header at the stream's start; returns it with its raw bytes."""
    return header_from(stream.read, file_size)


def header_from(read: Callable[[int], bytes], file_size: int) -> tuple[EdfHeader, bytes]:
    """`read_header` for a reader function."""
    first = read_exactly(read, BLOCK)
    _, _, header_bytes = parse_fixed(first, file_size)
    data = first + read_exactly(read, header_bytes - BLOCK)
    return parse_header(data, file_size), data


# --------------------------------------------------------------------------- writing


def field(text: str, width: int, name: str) -> bytes:
    """A space-padded fixed-width field; refuses what a strict reader would refuse."""
    if len(text) > width or not text.isascii() or not text.isprintable():
        raise UsageError(f"header field {name} does not fit {width} printable ASCII characters")
    return text.encode("ascii").ljust(width, b" ")


def pack_header(fixed: Mapping[str, bytes], signals: Sequence[Mapping[str, bytes]]) -> bytes:
    """Concatenate fields in the EDF order, checking every width."""
    parts = []
    for name, width in FIXED_FIELDS:
        if len(fixed[name]) != width:
            raise UsageError(f"header field {name} must be {width} bytes")
        parts.append(fixed[name])
    for name, width in SIGNAL_FIELDS:
        for signal in signals:
            if len(signal[name]) != width:
                raise UsageError(f"signal header field {name} must be {width} bytes")
            parts.append(signal[name])
    return b"".join(parts)


def edf_date(date: dt.date) -> str:
    """dd.mm.yy for the header startdate field."""
    if not EDF_FIRST_DATE <= date <= EDF_LAST_DATE:
        raise InvalidInput("start date outside EDF's 1985-2084 window")
    return f"{date.day:02}.{date.month:02}.{date.year % 100:02}"


def plus_date(date: dt.date) -> str:
    """dd-MMM-yyyy for EDF+ subfields."""
    return f"{date.day:02}-{MONTHS[date.month - 1]}-{date.year:04}"


def parse_plus_date(text: str) -> dt.date | None:
    m = _PLUS_DATE.fullmatch(text)
    if not m or m[2].upper() not in MONTHS:
        return None
    return date_or_none(int(m[1]), MONTHS.index(m[2].upper()) + 1, int(m[3]))


# --------------------------------------------------------------------------- channels


def policed_channels(signals: Sequence[SignalHeader]) -> list[tuple[str, str]]:
    """The (label, unit) to write for each signal (vault.formats.channels): a known electrode or
    channel name is kept once (a repeat, ignoring case, is replaced too), any other label
    becomes CHnn by position; a known unit is kept, any other is blanked. Annotation signals
    keep their label."""
    out, seen = [], set()
    for s in signals:
        label = s.label
        if not s.is_annotation:
            if not is_known_label(label) or label.casefold() in seen:
                label = neutral_label(s.index + 1)
            seen.add(label.casefold())
        out.append((label, s.unit if is_known_unit(s.unit) else ""))
    return out


def with_known_channels(header: bytes, h: EdfHeader) -> bytes:
    """`header` (the bytes `h` was parsed from) with labels and units policed as at ingest:
    unchanged for anything this version stored, a safety net for files stored before."""
    signals = []
    for s, (label, unit) in zip(h.signals, policed_channels(h.signals), strict=True):
        new = dict(s.raw)
        if label != s.label:
            new["label"] = field(label, 16, "label")
        if unit != s.unit:
            new["dimension"] = field(unit, 8, "dimension")
        signals.append(new)
    return pack_header(h.raw, signals) + header[h.header_bytes :]


# --------------------------------------------------------------------------- demographics


def demographics(h: EdfHeader) -> tuple[str, str]:
    """(sex, age band) that de-identification kept in an EDF+ patient field ("n/a" if none)."""
    if not h.is_plus:
        return "n/a", "n/a"
    parts = h.raw["patient"].decode("ascii").split()
    sex = parts[1] if len(parts) > 1 and parts[1] in ("F", "M") else "n/a"
    band = next((p for p in parts[4:] if _AGE_BAND.fullmatch(p)), "n/a")
    return sex, band


def without_demographics(header: bytes, h: EdfHeader) -> bytes:
    """`header` (the bytes `h` was parsed from) with the patient field's sex and age band
    blanked: EDF+ "X X X X", plain EDF "X" (offsets 8-88, EDF specification)."""
    patient = field("X X X X" if h.is_plus else "X", 80, "patient")
    return header[:8] + patient + header[88:]


# --------------------------------------------------------------------------- date shifting


def clamp_date(date: dt.date) -> dt.date:
    """`date` moved to the nearest day of EDF's 1985-2084 window if it lies outside."""
    return min(max(date, EDF_FIRST_DATE), EDF_LAST_DATE)


def shifted_date(date: dt.date, offset_days: int) -> tuple[dt.date, bool]:
    """(`date` moved by whole days, clamped) into EDF's 1985-2084 window; True if clamped.

    The rule: a valid file is never refused for its date. A shift that would leave the
    window (a recording older than the participant's first by more than the offset's
    headroom, or a placeholder date such as 01.01.85) lands on the window's first or last
    day instead, and the report says "date clamped"; that file's distance in days to the
    participant's other recordings is then not kept.
    """
    ordinal = date.toordinal() + offset_days
    low, high = EDF_FIRST_DATE.toordinal(), EDF_LAST_DATE.toordinal()
    return dt.date.fromordinal(min(max(ordinal, low), high)), not low <= ordinal <= high


def uniform_below(n: int, random_bytes: Callable[[int], bytes]) -> int:
    """Uniform integer in [0, n) by rejection sampling; pass vault.crypto.random_bytes."""
    if n < 1:
        raise UsageError("uniform_below needs n >= 1")
    nbytes = (n.bit_length() + 7) // 8 + 1
    bound = (256**nbytes // n) * n
    while True:
        value = int.from_bytes(random_bytes(nbytes), "big")
        if value < bound:
            return value % n


def choose_date_offset(
    random_below: Callable[[int], int],
    start_date: dt.date,
    *,
    min_years: int = 2,
    max_years: int = 30,
    margin_years: int = 1,
) -> int:
    """A per-participant shift in whole days, drawn uniformly from an allowed range.

    Backwards by `min_years`..`max_years` (365-day years) when that keeps the first
    recording at least `margin_years` after 1985-01-01, leaving room for older files
    of the same participant; otherwise forwards by the same amounts, keeping the
    date `margin_years` before 2084-12-31. `random_below(n)` returns a uniform
    integer in [0, n) from a CSPRNG (e.g. `lambda n: uniform_below(n, random_bytes)`).
    """
    start_date = clamp_date(start_date)  # a NumPy sidecar may name any date
    if not 1 <= min_years <= max_years or margin_years < 0 or min_years + margin_years > 45:
        raise UsageError("choose_date_offset needs 1 <= min_years <= max_years, small margin")
    low, high, margin = 365 * min_years, 365 * max_years, 365 * margin_years
    back = min(high, (start_date - EDF_FIRST_DATE).days - margin)
    if back >= low:
        return -(low + random_below(back - low + 1))
    ahead = min(high, (EDF_LAST_DATE - start_date).days - margin)
    return low + random_below(ahead - low + 1)


# --------------------------------------------------------------------------- de-identification


@dataclass(frozen=True)
class DeidOptions:
    """What de-identification keeps.

    `date_offset_days`: the participant's secret whole-day shift (see
    `choose_date_offset`). `event_codes`: annotation labels it declares are kept
    (`vault.policy.event_codes.EventCodes`), every other label becomes `neutral_label`.
    `keep_sex` keeps the EDF+ sex subfield (M/F); `age_band_years` replaces the
    birthdate by an additional patient subfield `age_<lo>-<hi>` (age in whole years
    at the original start date, in bands of that width; `age_90+` above 89, following
    the US HIPAA safe-harbour rule, cited from memory). The birthdate subfield itself
    is always written as X.
    """

    date_offset_days: int
    event_codes: EventCodes | None = None
    neutral_label: str = "event"
    keep_sex: bool = False
    age_band_years: int | None = None

    def __post_init__(self) -> None:
        label = self.neutral_label
        if not (1 <= len(label) <= 40 and label.isascii() and label.isprintable()):
            raise UsageError("neutral_label must be 1-40 printable ASCII characters")
        if self.age_band_years is not None and not 1 <= self.age_band_years <= 50:
            raise UsageError("age_band_years must be between 1 and 50")
        if self.event_codes is not None and not isinstance(self.event_codes, EventCodes):
            raise UsageError("event_codes must be an EventCodes list (no free regular expressions)")


@dataclass(frozen=True, repr=False)
class RemovedIdentity:
    """The identifying header text removed from the copy, for the encrypted identity record.

    Plaintext participant data: hand it only to the encrypted store, never log it.
    """

    values: Mapping[str, str]  # field name (as in the report) -> original text
    start_date: dt.date | None  # before shifting (None: the input had none)

    def __repr__(self) -> str:
        return f"RemovedIdentity(<{len(self.values)} fields withheld>)"


@dataclass(frozen=True)
class HeaderDeid:
    header: bytes
    changed: tuple[str, ...]
    identity: RemovedIdentity
    start_date: dt.date  # shifted
    sex_kept: bool
    age_band_written: bool
    labels_replaced: int = 0  # ordinary signals whose label was not a known channel name
    units_replaced: int = 0  # signals whose physical dimension was not a known unit
    date_known: bool = True  # False: EDF+ "Startdate X", kept unknown and unshifted
    date_clamped: bool = False  # the shifted date was clamped into 1985-2084


def known_start_date(h: EdfHeader) -> dt.date | None:
    """The start date the header states, or None for EDF+'s anonymised "Startdate X"."""
    if h.is_plus:
        rec = h.raw["recording"].decode("ascii").split()
        if len(rec) >= 2 and rec[0] == "Startdate" and rec[1] == "X":
            return None
    return h.start_date


def _age_band(birth: dt.date | None, start: dt.date, width: int) -> str | None:
    if birth is None or birth > start:
        return None
    age = start.year - birth.year - ((start.month, start.day) < (birth.month, birth.day))
    low = age // width * width
    return "age_90+" if low >= 90 else f"age_{low}-{min(low + width - 1, 89)}"


def _subfields(raw: bytes, names: Sequence[str]) -> dict[str, str]:
    parts = raw.decode("ascii").split()
    out = {name: (parts[i] if i < len(parts) else "X") for i, name in enumerate(names)}
    out["additional"] = " ".join(parts[len(names) :])
    return out


def deidentify_header(h: EdfHeader, opts: DeidOptions) -> HeaderDeid:
    """The de-identified header bytes, the names of changed fields and what was removed."""
    fixed = dict(h.raw)
    changed: list[str] = []
    removed: dict[str, str] = {}

    def put(name: str, new: str, original: str, placeholder: str = "X") -> None:
        if new != original:
            changed.append(name)
            if original not in ("", placeholder):
                removed[name] = original

    start = h.start_date
    sex_kept = age_written = clamped = False
    known = known_start_date(h) is not None
    if h.is_plus:
        pat = _subfields(h.raw["patient"], ("code", "sex", "birthdate", "name"))
        rec = _subfields(h.raw["recording"], ("keyword", "startdate", "admincode",
                                              "technician", "equipment"))  # fmt: skip
        if rec["keyword"] == "Startdate" and rec["startdate"] != "X":
            rec_date = parse_plus_date(rec["startdate"])
            if rec_date is None:
                raise _bad("recording field (offset 88)", "has a malformed Startdate subfield")
            if rec_date != start:
                raise _bad("recording field (offset 88)", "disagrees with the startdate field")
        # EDF+ "Startdate X": the date is unknown and the startdate field a placeholder
        # (01.01.85 by the EDF+ specification, from memory): nothing to shift.
        shifted, clamped = shifted_date(start, opts.date_offset_days) if known else (EDF_FIRST_DATE, False)
        sex = pat["sex"] if opts.keep_sex and pat["sex"] in ("F", "M") else "X"
        sex_kept = sex != "X"
        patient = f"X {sex} X X"
        band = None
        if opts.age_band_years and known:
            band = _age_band(parse_plus_date(pat["birthdate"]), start, opts.age_band_years)
            patient += f" {band}" if band else ""
            age_written = band is not None
        for name in ("code", "sex", "birthdate", "name"):
            new = sex if name == "sex" else "X"
            put(f"patient.{name}", new, pat[name])
        put("patient.additional", band or "", pat["additional"], "")
        rec_text = plus_date(shifted) if known else "X"
        recording = f"Startdate {rec_text} X X X"
        if rec["keyword"] != "Startdate":
            put("recording", recording, h.raw["recording"].decode("ascii").rstrip())
        else:
            put("recording.startdate", rec_text, rec["startdate"])
            for name in ("admincode", "technician", "equipment"):
                put(f"recording.{name}", "X", rec[name])
            put("recording.additional", "", rec["additional"], "")
    else:
        shifted, clamped = shifted_date(start, opts.date_offset_days)
        patient = recording = "X"
        for name in ("patient", "recording"):
            put(name, "X", h.raw[name].decode("ascii").rstrip())
    fixed["patient"] = field(patient, 80, "patient")
    fixed["recording"] = field(recording, 80, "recording")
    fixed["startdate"] = field(edf_date(shifted), 8, "startdate")
    if fixed["startdate"] != h.raw["startdate"]:
        changed.append("startdate")
    _, keep_reserved = _variant(h.raw["reserved"], h.is_bdf)
    reserved = h.raw["reserved"].decode("ascii").rstrip() if keep_reserved else ""
    put("reserved", reserved, h.raw["reserved"].decode("ascii").rstrip(), "")
    fixed["reserved"] = field(reserved, 44, "reserved")
    fixed["n_records"] = field(str(h.n_records), 8, "n_records")
    if fixed["n_records"] != h.raw["n_records"]:
        changed.append("n_records")
    signals = []
    labels_replaced = units_replaced = 0
    for s, (label, unit) in zip(h.signals, policed_channels(h.signals), strict=True):
        new = dict(s.raw)
        if label != s.label:
            put(f"signal {s.index} label", label, s.label, "")
            new["label"] = field(label, 16, "label")
            labels_replaced += 1
        if unit != s.unit:
            put(f"signal {s.index} dimension", unit, s.unit, "")
            new["dimension"] = field(unit, 8, "dimension")
            units_replaced += 1
        for name, pattern in (("transducer", TRANSDUCER_PATTERN), ("prefilter", PREFILTER_PATTERN),
                              ("reserved", None)):  # fmt: skip
            text = s.raw[name].decode("ascii").rstrip()
            keep = text if pattern is not None and pattern.fullmatch(text) else ""
            put(f"signal {s.index} {name}", keep, text, "")
            new[name] = field(keep, len(s.raw[name]), name)
        signals.append(new)
    identity = RemovedIdentity(removed, start)
    header = pack_header(fixed, signals)
    return HeaderDeid(header, tuple(changed), identity, shifted, sex_kept, age_written,
                      labels_replaced, units_replaced, known, clamped)
