"""The streamed EDF reader against the file reader: the same bytes out for the same input,
however the stream splits its reads; every way a stream can misbehave is refused.

Input: the EDF/EDF+/BDF files shipped in the pyedflib package (pyedflib/tests/data); the
oracle for "the same" is the file path version, itself checked against pyedflib and edfio
in tests/formats/test_edf.py.
"""

from __future__ import annotations

import random
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.formats.test_edf import sample
from vault.errors import InvalidInput, UsageError
from vault.formats.edf import (
    DeidOptions,
    deidentified_blocks,
    deidentified_stream,
    read_stream_header,
)
from vault.policy.event_codes import EventCodes

FILES = ["test_generator.edf", "test_generator.bdf", "test_subsecond.edf", "test_utf8.edf",
         "test_generator_datarec_generator_0_5.bdf"]
SLOW = settings(deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


def opts() -> DeidOptions:
    return DeidOptions(date_offset_days=-1234, event_codes=EventCodes(["stim/1"]))


class Trickle:
    """A sequential reader that returns at most a few bytes per call, as a socket may."""

    def __init__(self, data: bytes, seed: int = 0, most: int = 4096) -> None:
        self.data, self.pos = data, 0
        self.rng = random.Random(seed)
        self.most = most
        self.calls = 0

    def read(self, n: int) -> bytes:
        self.calls += 1
        k = min(n, self.rng.randint(1, self.most))
        out = self.data[self.pos : self.pos + k]
        self.pos += len(out)
        return out


def streamed(data: bytes, size: int | None = None, *, block: int = 1 << 20, reader=None) -> bytes:
    reader = reader or Trickle(data)
    header, raw, read = read_stream_header(reader, len(data) if size is None else size)
    d = deidentified_stream(header, raw, read, len(data) if size is None else size, opts(), block)
    out = d.header + b"".join(d.blocks)
    assert d.report.complete
    return out


def from_file(path: Path) -> bytes:
    d = deidentified_blocks(path, opts())
    return d.header + b"".join(d.blocks)


@pytest.mark.parametrize("name", FILES)
def test_stream_gives_the_file_versions_bytes(name: str) -> None:
    src = sample(name)
    assert streamed(src.read_bytes()) == from_file(src)


@settings(SLOW, max_examples=40)
@given(seed=st.integers(0, 2**32), most=st.integers(61, 70_000), block=st.integers(1, 1 << 20),
       name=st.sampled_from(FILES))
def test_any_read_split_and_block_size_gives_the_same_bytes(seed: int, most: int, block: int,
                                                            name: str) -> None:
    src = sample(name)
    data = src.read_bytes()
    assert streamed(data, block=block, reader=Trickle(data, seed, most)) == from_file(src)


def test_content_digest_sees_exactly_the_input() -> None:
    data = sample("test_generator.edf").read_bytes()
    seen: list[bytes] = []
    header, raw, read = read_stream_header(Trickle(data), len(data))
    d = deidentified_stream(header, raw, read, len(data), opts(), observe=seen.append)
    for _ in d.blocks:
        pass
    assert b"".join(seen) == data


def _consume(data: bytes, size: int, reader=None) -> None:
    reader = reader or Trickle(data)
    header, raw, read = read_stream_header(reader, size)
    for _ in deidentified_stream(header, raw, read, size, opts()).blocks:
        pass


@settings(SLOW, max_examples=40)
@given(cut=st.integers(0, 10_000))
def test_a_stream_ending_early_is_refused(cut: int) -> None:
    data = sample("test_generator.edf").read_bytes()
    with pytest.raises(InvalidInput) as info:
        _consume(data[: len(data) - 1 - cut], len(data))  # announced whole, sent short
    assert "Hans" not in str(info.value) and str(len(data)) not in str(info.value)


@pytest.mark.parametrize("extra", [b"\x00", b"junk after the last record", b"\x00" * 100_000])
def test_a_stream_sending_more_than_announced_is_refused(extra: bytes) -> None:
    data = sample("test_generator.edf").read_bytes()
    with pytest.raises(InvalidInput, match="more bytes than its announced size"):
        _consume(data + extra, len(data))


@pytest.mark.parametrize("delta", [-1, 1, -296, 296, 10_000])
def test_an_announced_size_the_header_disagrees_with_is_refused_before_the_records(delta: int
                                                                                  ) -> None:
    data = sample("test_generator.edf").read_bytes()
    reader = Trickle(data)
    with pytest.raises(InvalidInput, match="number-of-records field") as info:
        read_stream_header(reader, len(data) + delta)
    assert reader.pos == 256 * 13  # only the header (12 signals) was read
    assert str(len(data) + delta) not in str(info.value)  # a field named, never a value


@pytest.mark.parametrize("size", [-1, True, "207616", 2.5, None])
def test_the_announced_size_must_be_a_byte_count(size: object) -> None:
    data = sample("test_generator.edf").read_bytes()
    with pytest.raises(UsageError, match="announced size"):
        read_stream_header(Trickle(data), size)  # type: ignore[arg-type]


class Breaks(Trickle):
    """Fails with `error` once `after` bytes were sent."""

    def __init__(self, data: bytes, after: int, error: BaseException) -> None:
        super().__init__(data)
        self.after, self.error = after, error

    def read(self, n: int) -> bytes:
        if self.pos >= self.after:
            raise self.error
        return super().read(min(n, self.after - self.pos))


@pytest.mark.parametrize("after", [0, 100, 256 * 12 + 5, 50_000, 207_000])
def test_a_dropped_connection_is_invalid_input(after: int) -> None:
    data = sample("test_generator.edf").read_bytes()
    with pytest.raises(InvalidInput, match="stream failed"):
        _consume(data, len(data), Breaks(data, after, ConnectionResetError("peer gone")))


class Lies(Trickle):
    def __init__(self, data: bytes, answer: object) -> None:
        super().__init__(data)
        self.answer = answer

    def read(self, n: int):  # type: ignore[override]
        if self.pos > 4000:
            return self.answer(n) if callable(self.answer) else self.answer
        return super().read(n)


@pytest.mark.parametrize("answer", ["text, not bytes", None, lambda n: b"\x00" * (n + 1), 42])
def test_a_reader_returning_something_else_is_refused(answer: object) -> None:
    data = sample("test_generator.edf").read_bytes()
    with pytest.raises(InvalidInput, match="other than the bytes"):
        _consume(data, len(data), Lies(data, answer))


def test_broken_annotations_mid_stream_abort_it() -> None:
    data = bytearray(sample("test_subsecond.edf").read_bytes())  # header 768, records of 296 bytes
    at = 768 + 7 * 296 + 256  # record 7's annotation signal (its last 40 bytes)
    assert data[at : at + 1] == b"+"
    data[at : at + 4] = b"oops"
    received = []
    with pytest.raises(InvalidInput, match="data record 7"):
        header, raw, read = read_stream_header(Trickle(bytes(data)), len(data))
        received.extend(deidentified_stream(header, raw, read, len(data), opts(), 296).blocks)
    assert len(received) == 7  # the consumer (the store) discards what it was given
