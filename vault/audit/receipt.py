"""Deletion receipts: what a withdrawal or a retention sweep destroyed, signed, checkable offline.

A receipt is a signed document (vault.audit.manifest, domain `deletion-receipt`) whose
body (format `mindward-deletion-receipt/1`, docs/erasure.md) names the vault, the
participant's random id, the scope, what was destroyed (counts, the data key's
commitment, blob ids), when, the stage the data had reached, the copies the vault
could not reach, and the audit entry of the erasure with its RFC 9162 inclusion
proof under a signed tree head. Nothing in it identifies the participant to
anyone who does not hold the vault.

`verify_receipt` needs only the vault's public key: it checks the Ed25519
signature over the canonical body, the inclusion proof against the signed head
inside the receipt, and that the audit entry names the same participant,
request, scope, blob ids and key commitment as the body.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

from vault.audit import log as audit
from vault.audit import manifest
from vault.errors import IntegrityError, InvalidInput

FORMAT = "mindward-deletion-receipt/1"
ERASE_ACTION = "withdraw.erase"  # full erasure (withdrawal or retention sweep)
PURPOSE_ACTION = "withdraw.purpose"  # one purpose withdrawn, only unneeded data deleted
_DOCUMENT_KEYS = frozenset({"body", "domain", "public_key", "signature"})
_BODY_KEYS = frozenset({
    "format", "receipt_id", "vault_id", "participant_id", "request_id", "scope", "trigger",
    "received", "deadline", "processed_at", "on_time", "destroyed", "kept", "consent", "stage",
    "unreachable_copies", "audit", "cautions",
})


def bound_fields(request_id: str, receipt_id: str, scope: str, blobs: list[str],
                 key_commitment: str | None) -> dict[str, Any]:
    """What the audit entry's `details` must repeat from the receipt (and verification checks)."""
    return {"request": request_id, "receipt": receipt_id, "scope": scope, "blobs": list(blobs),
            "key_commitment": key_commitment}


def expected_action(scope: str) -> str:
    return ERASE_ACTION if scope == "full" else PURPOSE_ACTION


def sign(key: Any, body: Mapping[str, Any]) -> dict[str, Any]:
    """Sign a receipt body with the vault's key (a `crypto.SigningKey`)."""
    missing = _BODY_KEYS - set(body)
    if missing or body.get("format") != FORMAT:
        raise IntegrityError("a receipt body is incomplete: " + ", ".join(sorted(missing)))
    return manifest.sign(key, manifest.RECEIPT, body)


def load(text: bytes | str) -> dict[str, Any]:
    """A receipt file's JSON; InvalidInput / IntegrityError when it is not a signed document."""
    return manifest.load(text, "the receipt")


def to_bytes(document: Mapping[str, Any]) -> bytes:
    """How a receipt is written to a file: sorted keys, indented, ASCII."""
    return (json.dumps(dict(document), indent=2, sort_keys=True) + "\n").encode("ascii")


def verify_receipt(document: Any, public_key: bytes) -> tuple[bool, list[str]]:
    """(ok, reasons) for a receipt, offline, with the vault's public key alone.

    Never raises for malformed input: every problem becomes a reason.
    """
    reasons: list[str] = []
    if not isinstance(document, Mapping):
        return False, ["not a signed document (a JSON object)"]
    if set(document) != _DOCUMENT_KEYS:
        reasons.append("unexpected or missing top-level fields")
    if document.get("public_key") != bytes(public_key).hex():
        reasons.append("the receipt names another public key than the one given")
    if not manifest.verify(document, public_key, manifest.RECEIPT):
        reasons.append("the signature does not verify with this public key (altered, or "
                       "signed by another vault)")
    body = document.get("body")
    if not isinstance(body, Mapping):
        return False, [*reasons, "no receipt body"]
    reasons += _check_body(body, public_key)
    return not reasons, reasons


def _check_body(body: Mapping[str, Any], public_key: bytes) -> list[str]:
    reasons: list[str] = []
    if body.get("format") != FORMAT:
        reasons.append(f"not a {FORMAT} body")
    if set(body) != _BODY_KEYS:
        reasons.append("the body has unexpected or missing fields")
    bundle = body.get("audit")
    if not isinstance(bundle, Mapping) or not _proven(bundle, public_key):
        return [*reasons, "the audit entry is not proven under the signed tree head"]
    head = bundle["tree_head"]
    if head.get("vault_id") != body.get("vault_id"):
        reasons.append("the signed tree head belongs to another vault")
    try:
        entry = audit.decode_entry(str(bundle["entry"]).encode("ascii"))
        destroyed = body["destroyed"]
        bound = bound_fields(body["request_id"], body["receipt_id"], body["scope"],
                             destroyed["blobs"], destroyed["key_commitment"])
    except (KeyError, TypeError, ValueError, IntegrityError):
        return [*reasons, "the body or its audit entry is malformed"]
    details = entry.get("details")
    if entry.get("action") != expected_action(str(body["scope"])):
        reasons.append("the audit entry records another action than this scope")
    if entry.get("subjects") != [body.get("participant_id")]:
        reasons.append("the audit entry names another participant")
    if entry.get("at") != body.get("processed_at"):
        reasons.append("the audit entry has another time than the receipt")
    if not isinstance(details, Mapping):
        return [*reasons, "the audit entry has no details"]
    for name, value in bound.items():
        if details.get(name) != value:
            reasons.append(f"the audit entry's {name} differs from the receipt's")
    return reasons


def _proven(bundle: Mapping[str, Any], public_key: bytes) -> bool:
    try:  # audit.verify_inclusion_bundle lets a non-JSON entry raise (reported to the lead)
        return audit.verify_inclusion_bundle(bundle, public_key)
    except (ValueError, TypeError, IntegrityError):
        return False


def verify_text(text: bytes | str, public_key: bytes) -> tuple[bool, list[str]]:
    """`verify_receipt` over a receipt file's bytes (malformed JSON is a reason, not an error)."""
    try:
        document = load(text)
    except (InvalidInput, IntegrityError) as exc:
        return False, [exc.message]
    return verify_receipt(document, public_key)
