r"""Declared event codes (vault.policy.event_codes): no free text, no catastrophic patterns.

The oracle for matching is written here independently: a code matches a text when the
text, split into maximal ASCII digit runs and the rest, lines up with the code's
literal characters and `\d{M,N}` runs.
"""

from __future__ import annotations

import re

import pytest
from hypothesis import given
from hypothesis import strategies as st

from vault.errors import UsageError
from vault.policy.event_codes import MAX_DIGITS, EventCodes


def _oracle(entry: str, text: str) -> bool:
    """Walk the entry; each \\d{M,N} eats the maximal run of ASCII digits (it touches none)."""
    i = j = 0
    while i < len(entry):
        run = re.match(r"\\d\{(\d)(?:,(\d))?\}", entry[i:])
        if run:
            k = j
            while k < len(text) and text[k] in "0123456789":
                k += 1
            if not int(run[1]) <= k - j <= int(run[2] or run[1]):
                return False
            i, j = i + run.end(), k
        else:
            if j >= len(text) or text[j] != entry[i]:
                return False
            i, j = i + 1, j + 1
    return j == len(text)


@pytest.mark.parametrize("bad", [
    "(a+)+$", "stim/.*", "stim/[A-Za-z]+", "stim/\\w+", "a|b", "x?", "\\d+", "\\d{1,5}", "\\d{0,2}",
    "\\d{3,2}", "S\\d{1,2}\\d{1,2}", "S1\\d{2}", "S\\d{2}7", "", " stim", "stim ", "x" * 41,
    "stim/\u00e9", "tab\there",
])  # fmt: skip
def test_patterns_that_could_keep_free_text_or_backtrack_are_refused(bad: str) -> None:
    with pytest.raises(UsageError) as info:
        EventCodes([bad])
    assert "digit runs" in info.value.message  # the message tells the steward what is allowed


def test_list_bounds() -> None:
    with pytest.raises(UsageError):
        EventCodes([])
    with pytest.raises(UsageError):
        EventCodes([f"c{i}" for i in range(201)])
    with pytest.raises(UsageError):
        EventCodes([3])  # type: ignore[list-item]


def test_free_text_after_a_prefix_is_not_kept() -> None:
    codes = EventCodes(["stim/\\d{1,3}", "block/start", "block/end", "S\\d{1,3}"])
    for kept in ("stim/1", "stim/999", "block/start", "S7"):
        assert codes.matches(kept)
    for dropped in ("stim/Zelda_visit", "stim/1234", "stim/", "stim/12x", "block/start ", "S٣",
                    "Stim/1", "block/startblock/end", "S7 Jane", "xS7"):  # fmt: skip
        assert not codes.matches(dropped), dropped


_ENTRY = st.lists(st.one_of(st.sampled_from(list("abZ/_.:-+ 09")),
                            st.sampled_from([f"\\d{{{m},{n}}}" for n in range(1, MAX_DIGITS + 1)
                                             for m in range(1, n + 1)])),
                  min_size=1, max_size=8).map("".join)


@given(entry=_ENTRY, text=st.text(st.sampled_from(list("abZ/_.:-+ 0123456789x")), max_size=24))
def test_matching_agrees_with_the_oracle(entry: str, text: str) -> None:
    try:
        codes = EventCodes([entry])
    except UsageError:
        return  # refused entries (adjacent runs, edge spaces) are checked above
    assert codes.matches(text) == _oracle(entry, text)


@given(entry=_ENTRY, data=st.data())
def test_every_expansion_of_an_entry_matches(entry: str, data: st.DataObject) -> None:
    try:
        codes = EventCodes([entry])
    except UsageError:
        return
    text = re.sub(r"\\d\{(\d),(\d)\}",
                  lambda m: "7" * data.draw(st.integers(int(m[1]), int(m[2]))), entry)
    assert codes.matches(text) and _oracle(entry, text)


def test_adversarial_annotations_do_not_blow_up() -> None:
    # Inputs that make backtracking regexes explode ((a+)+$ on "aaaa...!"): here each run is
    # pinned to the maximal digit run, so these return at once (no timing asserted: a
    # catastrophic matcher would hang this test instead).
    codes = EventCodes([f"s{i}/\\d{{1,4}}/\\d{{1,4}}:\\d{{1,4}}" for i in range(200)])
    for text in ("s1/" + "1" * 5000 + "!", "s199/1/1:" + "9" * 10_000, "a" * 10_000 + "!"):
        assert not codes.matches(text)
    assert codes.matches("s199/1/22:333")
