"""Preference scores and ratings files: parse, validate, canonicalise. No I/O but reading the CSV.

A file has a header naming `participant_id`, `item_id` and `value` (in any order;
other columns are refused, since free text can name people). Every row is checked
against the category's declared type and range; the first problem is reported
with its row number (the header is row 1) and nothing of the file is stored.
Values are never echoed in messages.
"""

from __future__ import annotations

import csv
import io
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from vault.errors import IntegrityError, InvalidInput, NotFound
from vault.policy.policyset import ITEM_ID_PATTERN, Category

COLUMNS = ("participant_id", "item_id", "value")
MAX_BYTES = 256 << 20
_PID = re.compile(r"[0-9a-f]{32}")
_ITEM = re.compile(ITEM_ID_PATTERN)
# Plain ASCII decimal notation only: float() would also take "١٢", "1_0", "inf", " 1 ".
_DECIMAL = re.compile(r"[+-]?([0-9]+(\.[0-9]*)?|\.[0-9]+)([eE][+-]?[0-9]+)?", re.ASCII)
_INTEGER = re.compile(r"[+-]?[0-9]+", re.ASCII)
MAX_CELL = 4096  # characters in one cell; the csv module's own limit (128 Ki) raises otherwise


@dataclass(frozen=True)
class ScoreRow:
    row: int  # 1-based line of the CSV (header is row 1)
    pid: str
    item: str
    value: float


def read_rows(source: Path | bytes, category: str, spec: Category) -> list[ScoreRow]:
    """Every row of a scores file (a path, or its bytes as uploaded), validated against the
    category's type and range."""
    if isinstance(source, bytes | bytearray | memoryview):
        raw = bytes(source)
    else:
        try:
            raw = Path(source).read_bytes()
        except OSError as exc:
            raise NotFound(f"cannot read {source}") from exc
    if len(raw) > MAX_BYTES:
        raise InvalidInput("scores file: larger than 256 MiB; split it")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise InvalidInput("scores file: not UTF-8 text") from None
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        return _rows(reader, category, spec)
    except csv.Error:  # e.g. a cell over the csv module's field limit (128 Ki characters)
        raise InvalidInput(f"scores file: row {reader.line_num}: not a well-formed CSV row "
                           "(a cell too long, or broken quoting)") from None


def _rows(reader: Any, category: str, spec: Category) -> list[ScoreRow]:
    header = next(reader, None)
    if header is None or sorted(h.strip() for h in header) != sorted(COLUMNS):
        raise InvalidInput("scores file: row 1: the header must name exactly "
                           "participant_id, item_id and value")
    index = {h.strip(): i for i, h in enumerate(header)}
    low, high = spec.value_range or (-math.inf, math.inf)
    catalogue = frozenset(spec.items) if spec.items is not None else None
    rows: list[ScoreRow] = []
    seen: set[tuple[str, str]] = set()
    for number, cells in enumerate(reader, start=2):
        if not cells or all(not c.strip() for c in cells):
            continue
        if len(cells) != len(COLUMNS):
            raise InvalidInput(f"scores file: row {number}: expected 3 cells, found {len(cells)}")
        if any(len(c) > MAX_CELL for c in cells):
            raise InvalidInput(f"scores file: row {number}: a cell is longer than {MAX_CELL} "
                               "characters")
        pid, item, text_value = (cells[index[c]].strip() for c in COLUMNS)
        if not _PID.fullmatch(pid):
            raise InvalidInput(f"scores file: row {number}: participant_id is not a vault "
                               "participant id (32 hex digits, as enrolment returned it)",
                               hint="enrol")
        if not _ITEM.fullmatch(item):
            raise InvalidInput(f"scores file: row {number}: item_id must be 1-64 letters, digits "
                               "or . _ : / -")
        if catalogue is not None and item not in catalogue:
            raise InvalidInput(f"scores file: row {number}: item_id is not in {category}'s item "
                               "catalogue (policy set); nothing was stored")
        value = _number(text_value, number, category, spec)
        if not low <= value <= high:
            raise InvalidInput(f"scores file: row {number}: value outside {category}'s range "
                               f"[{low:g}, {high:g}]")
        if (pid, item) in seen:
            raise InvalidInput(f"scores file: row {number}: duplicate participant and item")
        seen.add((pid, item))
        rows.append(ScoreRow(number, pid, item, value))
    if not rows:
        raise InvalidInput("scores file: no rows")
    return rows


def _number(text: str, row: int, category: str, spec: Category) -> float:
    if text.lower().lstrip("+-") in ("nan", "inf", "infinity"):
        raise InvalidInput(f"scores file: row {row}: value is not a finite number")
    if not _DECIMAL.fullmatch(text):
        raise InvalidInput(f"scores file: row {row}: value is not a number in ASCII decimal "
                           "notation")
    value = float(text)
    if not math.isfinite(value):
        raise InvalidInput(f"scores file: row {row}: value is not a finite number")
    if spec.value_type == "integer" and (value != int(value) or not _INTEGER.fullmatch(text)):
        raise InvalidInput(f"scores file: row {row}: {category} takes whole numbers")
    return value


def by_participant(rows: Sequence[ScoreRow]) -> dict[str, list[ScoreRow]]:
    groups: dict[str, list[ScoreRow]] = {}
    for row in rows:
        groups.setdefault(row.pid, []).append(row)
    return groups


MAGIC = b"MWS1"


def canonical(rows: Sequence[ScoreRow]) -> bytes:
    """The plaintext stored for one participant's batch (format MWS1, docs/formats.md):

    "MWS1" || u32 count (big-endian) || u32 length of the item block || item ids joined by
    "\\n" (UTF-8, sorted) || count float64 values (little-endian), in the same order.
    Compact and fast to decode for exports; one canonical encoding per set of rows.
    """
    ordered = sorted(rows, key=lambda r: r.item)
    names = "\n".join(r.item for r in ordered).encode("utf-8")
    values = np.array([r.value for r in ordered], dtype="<f8")
    return (MAGIC + len(ordered).to_bytes(4, "big") + len(names).to_bytes(4, "big") + names
            + values.tobytes())


def _layout(raw: bytes) -> tuple[int, int]:
    """(count, item block size) of an MWS1 batch whose lengths add up; ValueError otherwise."""
    if raw[:4] != MAGIC or len(raw) < 12:
        raise ValueError
    count = int.from_bytes(raw[4:8], "big")
    size = int.from_bytes(raw[8:12], "big")
    if len(raw) != 12 + size + 8 * count or (count == 0 and size):
        raise ValueError
    return count, size


def decode(raw: bytes) -> tuple[list[str], np.ndarray]:
    """(item ids, values) of one stored batch; IntegrityError when it is not an MWS1 batch."""
    many = decode_many([raw])
    return [many.items[c] for c in many.codes.tolist()], many.values


@dataclass(frozen=True)
class Decoded:
    """Many batches as flat arrays: rating r belongs to batch `np.repeat(range, counts)[r]`,
    rates item `items[codes[r]]` with `values[r]`. `items` is sorted and holds each id once."""

    items: list[str]
    codes: np.ndarray
    values: np.ndarray
    counts: np.ndarray


def decode_many(raws: Sequence[bytes]) -> Decoded:
    """Decode stored MWS1 batches in bulk (Apache Arrow splits and hashes the item ids).

    Every batch is checked as `decode` checks one: lengths, item count, UTF-8,
    item id syntax, finite values; any failure raises IntegrityError.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    counts = np.zeros(len(raws), np.int64)
    blocks: list[bytes] = []
    value_parts: list[memoryview] = []
    try:
        for i, raw in enumerate(raws):
            count, size = _layout(raw)
            counts[i] = count
            if count:
                view = memoryview(raw)
                blocks.append(raw[12 : 12 + size])
                value_parts.append(view[12 + size :])
    except ValueError:
        raise IntegrityError("a stored score batch is malformed") from None
    split = pc.split_pattern(pa.array(blocks, pa.large_binary()), pattern=b"\n")
    if not np.array_equal(pc.list_value_length(split).to_numpy(zero_copy_only=False),
                          counts[counts > 0]):
        raise IntegrityError("a stored score batch is malformed")
    encoded = split.flatten().dictionary_encode()
    try:
        names = [b.decode("utf-8") for b in encoded.dictionary.to_pylist()]
    except UnicodeDecodeError:
        raise IntegrityError("a stored score batch is malformed") from None
    if not all(_ITEM.fullmatch(name) for name in names):
        raise IntegrityError("a stored score batch is malformed")
    order = sorted(range(len(names)), key=names.__getitem__)
    rank = np.empty(len(names), np.int64)
    rank[order] = np.arange(len(names))
    codes = rank[encoded.indices.to_numpy(zero_copy_only=False).astype(np.int64, copy=False)]
    starts = np.cumsum(counts[counts > 0])[:-1]  # a batch lists its items sorted, each once
    rising = np.diff(codes) > 0
    rising[starts - 1] = True
    if not rising.all():
        raise IntegrityError("a stored score batch is malformed")
    values = np.frombuffer(b"".join(value_parts), dtype="<f8").astype(np.float64, copy=False)
    if not np.isfinite(values).all():
        raise IntegrityError("a stored score batch is malformed")
    return Decoded([names[j] for j in order], codes, values, counts)
