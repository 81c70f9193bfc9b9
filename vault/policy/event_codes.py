r"""Event codes kept in annotations: a declared list, never a free-text pattern.

Each entry is literal characters (letters, digits, space and `_ . / : + -`) and digit
runs written `\d{N}` or `\d{M,N}` (1 <= M <= N <= 4), e.g. `stim/\d{1,3}`,
`block/start`, `S\d{1,3}`. An annotation is kept only if it equals one entry, each
digit run standing for that many ASCII digits; every other annotation is relabelled.

Why so narrow: a general regular expression can let free text through
(`stim/.*` keeps `stim/Zelda_visit`) and can take exponential time on one
annotation (`(a+)+$`). Here a digit run may touch neither a literal digit nor
another run, so it must match exactly the maximal run of digits at its place:
matching one annotation against one entry is linear in its length, and against
the list at most linear times the number of entries. Runs are capped at 4 digits
so that a kept code cannot carry a date of birth or a phone number.
"""

from __future__ import annotations

import re
from collections.abc import Iterable

from vault.errors import UsageError

__all__ = ["MAX_DIGITS", "MAX_ENTRIES", "MAX_ENTRY_CHARS", "EventCodes"]

MAX_ENTRIES = 200
MAX_ENTRY_CHARS = 40
MAX_DIGITS = 4
_LITERAL = re.compile(r"[A-Za-z0-9 _./:+-]")
_RUN = re.compile(r"\\d\{([1-9])(?:,([1-9]))?\}")
RULE = (r"entries are letters, digits, space and _ . / : + - with digit runs \d{N} or \d{M,N} "
        f"(N <= {MAX_DIGITS}) that touch no other digit")


def _compile_entry(entry: object, where: str) -> tuple[str, int]:
    """(regex text, longest text it matches) for one entry, or UsageError."""
    if not isinstance(entry, str) or not 1 <= len(entry) <= MAX_ENTRY_CHARS:
        raise UsageError(f"{where}: must be text of 1-{MAX_ENTRY_CHARS} characters")
    if entry != entry.strip(" "):
        raise UsageError(f"{where}: may not start or end with a space")
    parts: list[str] = []
    longest = 0
    previous = ""  # "digit", "run" or "other": what the last piece was
    pos = 0
    while pos < len(entry):
        run = _RUN.match(entry, pos)
        if run:
            low = int(run[1])
            high = int(run[2] or run[1])
            if not low <= high <= MAX_DIGITS:
                raise UsageError(f"{where}: digit runs need 1 <= M <= N <= {MAX_DIGITS}")
            if previous in ("digit", "run"):
                raise UsageError(f"{where}: a digit run may not follow a digit or another run")
            parts.append(f"[0-9]{{{low},{high}}}")
            longest += high
            previous = "run"
            pos = run.end()
            continue
        char = entry[pos]
        if not _LITERAL.fullmatch(char):
            raise UsageError(f"{where}: character {pos + 1} is not allowed")
        if char.isdigit() and previous == "run":
            raise UsageError(f"{where}: a digit run may not be followed by a digit")
        parts.append(re.escape(char))
        longest += 1
        previous = "digit" if char.isdigit() else "other"
        pos += 1
    return "".join(parts), longest


class EventCodes:
    """A validated list of event codes; `matches(text)` says whether an annotation is kept."""

    def __init__(self, entries: Iterable[str], *, what: str = "event code") -> None:
        items = list(entries)
        if not 1 <= len(items) <= MAX_ENTRIES:
            raise UsageError(f"{what}s: list 1 to {MAX_ENTRIES} codes")
        try:
            compiled = [_compile_entry(e, f"{what} {i + 1}") for i, e in enumerate(items)]
        except UsageError as exc:
            raise UsageError(f"{exc.message} ({RULE})") from None
        self.entries: tuple[str, ...] = tuple(items)
        self._longest = max(n for _, n in compiled)
        self._regex = re.compile("|".join(f"(?:{rx})" for rx, _ in compiled))

    def matches(self, text: str) -> bool:
        return len(text) <= self._longest and self._regex.fullmatch(text) is not None

    def __repr__(self) -> str:
        return f"EventCodes({list(self.entries)!r})"
