"""One strict JSON reader for every JSON document the tool reads from outside.

Signed documents (receipts, manifests, tree heads, proofs) and input files (sidecars)
go through `loads`. Python's own `json.loads` keeps the LAST of two equal keys,
while other readers keep the first, so `{"participant_id": "forged",
"participant_id": "real"}` would verify here and show "forged" elsewhere. We
refuse: duplicate keys, NaN/Infinity (not JSON, RFC 8259 section 6) and nesting
too deep for the parser all raise `ValueError` (a `JsonRejected`).
"""

from __future__ import annotations

import json
from typing import Any


class JsonRejected(ValueError):
    """The text is not strict JSON (duplicate key, non-finite number, too deep)."""


def _pairs(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise JsonRejected(f"duplicate key {key[:40]!r} in a JSON object")
        out[key] = value
    return out


def _constant(name: str) -> Any:
    raise JsonRejected(f"{name} is not a JSON number")


def loads(text: str | bytes) -> Any:
    """Parse strict JSON; `ValueError` (JsonRejected, JSONDecodeError, UnicodeDecodeError)."""
    try:
        return json.loads(text, object_pairs_hook=_pairs, parse_constant=_constant)
    except RecursionError as exc:  # the C scanner's own depth guard
        raise JsonRejected("JSON nested too deeply") from exc
