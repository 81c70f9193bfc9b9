"""The one timestamp format of the vault: ISO 8601 UTC to the second. Format and parse
only; the clock is read in vault/api.py alone."""

from __future__ import annotations

import datetime as dt

FORMAT = "%Y-%m-%dT%H:%M:%SZ"


def iso_utc(value: dt.datetime) -> str:
    """`value` in UTC, to the second, as the vault writes every time."""
    return value.astimezone(dt.UTC).strftime(FORMAT)


def parse_utc(text: str) -> dt.datetime:
    """A time the vault wrote (ValueError for anything else)."""
    return dt.datetime.strptime(text, FORMAT).replace(tzinfo=dt.UTC)
