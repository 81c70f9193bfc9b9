"""Stored score batches (format MWS1, docs/formats.md) decoded in bulk.

The oracle is `reference_decode` below, written from the format's description
with `struct` alone (no Arrow, no numpy), so the bulk decoder is checked
against the spec, not against itself.
"""

from __future__ import annotations

import math
import struct

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from vault.errors import IntegrityError
from vault.formats import scores

PID = "0" * 32
ITEM_CHARS = "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_.:/-"
PROPERTY = settings(max_examples=150, deadline=None)


def reference_decode(raw: bytes) -> list[tuple[str, float]]:
    """MWS1 read from its description: magic, u32 BE count, u32 BE item-block length, the
    block (ids joined by newline, sorted, each once), count little-endian float64 values."""
    if raw[:4] != b"MWS1" or len(raw) < 12:
        raise ValueError("magic")
    count, size = struct.unpack(">II", raw[4:12])
    if len(raw) != 12 + size + 8 * count:
        raise ValueError("lengths")
    names = raw[12 : 12 + size].decode("utf-8").split("\n") if count else []
    if count == 0 and size:
        raise ValueError("block without items")
    values = struct.unpack(f"<{count}d", raw[12 + size :])
    if len(names) != count or names != sorted(set(names)):
        raise ValueError("names")
    if not all(math.isfinite(x) for x in values):
        raise ValueError("values")
    if not all(scores._ITEM.fullmatch(n) for n in names):
        raise ValueError("syntax")
    return list(zip(names, values, strict=True))


item_ids = st.builds(lambda head, tail: head + tail, st.sampled_from(ITEM_CHARS[:62]),
                     st.text(ITEM_CHARS, max_size=12))
batch_rows = st.dictionaries(item_ids, st.floats(-1e6, 1e6, allow_nan=False), max_size=30)


def encode(rows: dict[str, float]) -> bytes:
    return scores.canonical([scores.ScoreRow(i, PID, item, value)
                             for i, (item, value) in enumerate(rows.items())])


def flat(decoded: scores.Decoded) -> list[list[tuple[str, float]]]:
    """Per batch, (item, value) pairs, from the bulk decoder's flat arrays."""
    out, at = [], 0
    for n in decoded.counts.tolist():
        codes, values = decoded.codes[at : at + n], decoded.values[at : at + n]
        out.append([(decoded.items[c], float(x)) for c, x in zip(codes.tolist(), values, strict=True)])
        at += n
    return out


@PROPERTY
@given(st.lists(batch_rows, max_size=8))
def test_bulk_decode_matches_the_format_description(batches: list[dict[str, float]]) -> None:
    raws = [encode(rows) for rows in batches]
    decoded = scores.decode_many(raws)
    assert flat(decoded) == [reference_decode(raw) for raw in raws]
    assert decoded.items == sorted({item for rows in batches for item in rows})
    assert decoded.codes.dtype == np.int64 and decoded.values.dtype == np.float64
    for raw in raws:  # the one-batch decoder agrees
        names, values = scores.decode(raw)
        assert list(zip(names, values.tolist(), strict=True)) == reference_decode(raw)


def test_no_batches_and_empty_batches() -> None:
    decoded = scores.decode_many([])
    assert decoded.items == [] and decoded.codes.size == decoded.values.size == 0
    empty = b"MWS1" + bytes(8)
    decoded = scores.decode_many([empty, encode({"dish-2": 1.0}), empty])
    assert decoded.counts.tolist() == [0, 1, 0] and flat(decoded)[1] == [("dish-2", 1.0)]


def _malformed(raw: bytes) -> bool:
    try:
        reference_decode(raw)
    except (ValueError, UnicodeDecodeError, struct.error):
        return True
    return False


@PROPERTY
@given(rows=batch_rows.filter(bool), other=batch_rows, data=st.data())
def test_every_damage_the_spec_forbids_is_refused(rows: dict[str, float], other: dict[str, float],
                                                  data: st.DataObject) -> None:
    raw = bytearray(encode(rows))
    kind = data.draw(st.sampled_from(["cut", "extend", "flip", "count", "size"]), label="kind")
    if kind == "cut":
        raw = raw[: data.draw(st.integers(0, len(raw) - 1), label="at")]
    elif kind == "extend":
        raw += data.draw(st.binary(min_size=1, max_size=20), label="extra")
    elif kind == "flip":
        pos = data.draw(st.integers(0, len(raw) - 1), label="pos")
        raw[pos] ^= data.draw(st.integers(1, 255), label="mask")
    else:
        field = slice(4, 8) if kind == "count" else slice(8, 12)
        value = int.from_bytes(raw[field], "big") + data.draw(st.sampled_from([-1, 1, 8]))
        raw[field] = max(value, 0).to_bytes(4, "big")
    bad = bytes(raw)
    good = encode(other)
    if _malformed(bad):  # a flipped value byte can still be a valid batch: then both accept it
        with pytest.raises(IntegrityError):
            scores.decode_many([good, bad])
        with pytest.raises(IntegrityError):
            scores.decode(bad)
    else:
        assert flat(scores.decode_many([good, bad]))[1] == reference_decode(bad)


@pytest.mark.parametrize("block", [b"b\na", b"a\na", b"a\n\nb", b"\xff\xfe", b"a b", b"-a"])
def test_unsorted_repeated_empty_non_utf8_or_bad_syntax_items_are_refused(block: bytes) -> None:
    count = block.count(b"\n") + 1
    raw = b"MWS1" + struct.pack(">II", count, len(block)) + block + struct.pack(f"<{count}d",
                                                                               *[1.0] * count)
    assert _malformed(raw)
    with pytest.raises(IntegrityError):
        scores.decode_many([encode({"dish-1": 2.0}), raw])


@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf])
def test_non_finite_values_are_refused(value: float) -> None:
    raw = encode({"dish-1": 1.0, "dish-2": 2.0})
    bad = raw[:-8] + struct.pack("<d", value)
    with pytest.raises(IntegrityError):
        scores.decode_many([bad])
