"""A clock that tests inject at `Vault.init`/`Vault.open`; the library never takes a per-call time."""

from __future__ import annotations

import datetime as dt
from typing import Any


class ManualClock:
    """Reads what the test last set; `advance` moves it on."""

    def __init__(self, start: dt.datetime | None = None) -> None:
        self._now = start or dt.datetime(2026, 6, 1, 9, 0, tzinfo=dt.UTC)

    def now(self) -> dt.datetime:
        return self._now

    def set(self, when: dt.datetime) -> None:
        if when.tzinfo is None:
            raise ValueError("test clocks carry a time zone")
        self._now = when

    def advance(self, **delta: float) -> dt.datetime:
        self._now += dt.timedelta(**delta)
        return self._now


def at(v: Any, when: dt.datetime) -> Any:
    """Set the injected clock of vault `v` to `when` and return `v` (for `at(v, T).enrol(...)`)."""
    clock = v._clock
    if not isinstance(clock, ManualClock):
        clock = v._clock = ManualClock(when)  # the engine reads the vault's clock attribute
    clock.set(when)
    return v


def ctx_at(v: Any, when: dt.datetime) -> Any:
    """`at(v, when)`, as the context a use case gets (for calling services directly)."""
    return at(v, when)._context()
