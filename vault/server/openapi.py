"""The service's OpenAPI 3.1 document, as docs/openapi.json keeps it:
`python -m vault.server.openapi > docs/openapi.json` (tests check it equals what a live server
serves at GET /v1/openapi.json)."""

from __future__ import annotations

import json
from typing import Any


def document() -> dict[str, Any]:
    from vault.server.app import build_app

    return build_app(None).openapi()


def text(doc: dict[str, Any] | None = None) -> str:
    return json.dumps(document() if doc is None else doc, indent=2, sort_keys=True) + "\n"


if __name__ == "__main__":
    print(text(), end="")
