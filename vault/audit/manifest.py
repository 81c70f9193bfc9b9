"""Signed documents the vault hands out: export manifests (and, with the same shape, receipts).

A signed document is `{"body": {...}, "signature": hex, "public_key": hex}` where the
signature is Ed25519 over "mindward/v1/signature/<domain>" 0x00 || canonical JSON of
`body` (docs/formats.md). Anyone with the vault's public key checks it offline.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

from vault import crypto
from vault.audit.log import canonical_json
from vault.errors import IntegrityError, InvalidInput
from vault.formats import strictjson

MANIFEST = "export-manifest"
RECEIPT = "deletion-receipt"


def sign(key: crypto.SigningKey, domain: str, body: Mapping[str, Any]) -> dict[str, Any]:
    payload = canonical_json(dict(body))
    return {"body": json.loads(payload), "signature": key.sign(domain, payload).hex(),
            "public_key": key.public_key.hex(), "domain": domain}


def verify(document: Any, public_key: bytes, domain: str) -> bool:
    """True only for an untampered document of `domain` signed by `public_key`."""
    try:
        if document.get("domain") != domain:
            return False
        payload = canonical_json(document["body"])
        signature = bytes.fromhex(document["signature"])
    except (AttributeError, KeyError, TypeError, ValueError):
        return False
    return crypto.verify_signature(public_key, domain, payload, signature)


def digest(document: Mapping[str, Any]) -> str:
    return crypto.sha256_hex(canonical_json(dict(document)))


def load(text: bytes | str, what: str) -> dict[str, Any]:
    try:
        doc = strictjson.loads(text)
    except strictjson.JsonRejected as exc:
        raise InvalidInput(f"{what} is not strict JSON: {exc}") from exc
    except ValueError as exc:
        raise InvalidInput(f"{what} is not JSON") from exc
    if not isinstance(doc, dict) or not isinstance(doc.get("body"), dict):
        raise IntegrityError(f"{what} is not a signed mindward document")
    return doc
