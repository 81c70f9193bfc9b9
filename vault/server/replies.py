"""Errors as HTTP: the body {"error", "exit_code", "hint", "param"} (one line, never a traceback,
never a value from participant data) and the status that goes with the exit code."""

from __future__ import annotations

import json
from typing import Any

from vault.errors import InvalidInput, Throttled, VaultError

# exit code (docs/cli.md) -> HTTP status (issue-15 contract)
STATUS_OF_EXIT = {1: 500, 2: 400, 3: 401, 4: 403, 5: 409, 6: 404, 7: 409, 8: 422, 9: 507, 10: 429}
RETRY_AFTER_S = 5


class BodyTooLarge(InvalidInput):
    """A request body over its limit (HTTP 413); nothing was stored."""


class ExportsBusy(Throttled):
    """Every export slot is taken (HTTP 503 with Retry-After)."""


def one_line(message: str, limit: int = 500) -> str:
    """Control characters escaped, long messages cut: an error is one line."""
    text = "".join(c if c.isprintable() else repr(c)[1:-1] for c in message)
    return text if len(text) <= limit else text[:limit] + "..."


def error_body(message: str, exit_code: int, *, hint: str | None = None,
               param: str | None = None) -> dict[str, Any]:
    return {"error": one_line(message), "exit_code": exit_code, "hint": hint, "param": param}


def status_of(exc: VaultError) -> int:
    if isinstance(exc, BodyTooLarge):
        return 413
    if isinstance(exc, ExportsBusy):
        return 503
    return STATUS_OF_EXIT.get(exc.exit_code, 500)


def headers_of(exc: VaultError) -> dict[str, str]:
    if isinstance(exc, ExportsBusy):
        return {"Retry-After": str(RETRY_AFTER_S)}
    if isinstance(exc, Throttled):
        return {"Retry-After": "60"}
    if exc.exit_code == 3:
        return {"WWW-Authenticate": "Bearer"}
    return {}


def of_error(exc: VaultError) -> dict[str, Any]:
    return error_body(exc.message, exc.exit_code, hint=exc.hint, param=exc.param)


def document(payload: Any) -> bytes:
    """A success body: the JSON document `mindward ... --json` prints."""
    return json.dumps(payload, indent=2, sort_keys=True, default=str).encode("utf-8")
