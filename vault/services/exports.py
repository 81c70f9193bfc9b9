"""What every export shares: pseudonyms, signed manifests, lineage, and checking an export later.

Pseudonyms are HMAC-SHA256 of the participant's random id under a key bound to
the export's purpose (ENISA's pseudonymisation guidance: keyed hashing, one
domain per purpose): stable within a purpose, unlinkable across purposes, and
never a plain hash. The vault keeps each export's lineage (which participants,
by internal id, under which pseudonym, to which recipient) so a later withdrawal
can name the exports and recipients to notify.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Mapping
from typing import TYPE_CHECKING, Any

from vault import crypto
from vault.audit import manifest
from vault.errors import IntegrityError, NotFound
from vault.policy.consent import permits_purpose
from vault.services import export_runs
from vault.storage import db as storage
from vault.storage import lineage, registry
from vault.times import iso_utc

if TYPE_CHECKING:
    from vault.policy.engine import Grant
    from vault.services.context import Context

DEFAULT_EXPORT_DAYS = 365
CAUTIONS = (
    "Pseudonymised data is still personal data (GDPR Recital 26): keep it under the data use "
    "agreement, do not try to re-identify anyone, and do not link it with other data.",
    "A participant may withdraw later; check this export against the vault (an export check) "
    "before each use and replace it when told to.",
    "Follow your ethics board's, data-protection officer's and local law's rules.",
)


def pseudonyms(ctx: Context, purpose: str, pids: Iterable[str]) -> dict[str, str]:
    """Each id's pseudonym for `purpose` (keyed by the door; see the module docstring)."""
    return ctx.door.pseudonyms(purpose, pids)


def new_export_id() -> str:
    return "x-" + crypto.random_id(8)


def sign_and_record(ctx: Context, *, export_id: str, kind: str, grant: Grant, members: Mapping[str, str],
                    body: Mapping[str, Any],
                    expires_days: int = DEFAULT_EXPORT_DAYS,
                    list_pseudonyms: bool = True) -> dict[str, Any]:
    """Sign the manifest (with the audit tree head at release) and record the lineage.

    `members` maps internal participant id -> pseudonym in the export. One transaction
    holds the lineage rows, the audit entry and the tree head the manifest names.
    """
    now = ctx.now()
    at = iso_utc(now)
    expires = iso_utc(now + dt.timedelta(days=expires_days))
    recipient = grant.request.recipient or "internal"
    with storage.transaction(ctx.conn):
        ctx.audit.append({"actor": ctx.member, "action": f"export.{kind}", "purpose": grant.purpose,
                         "subjects": sorted(members), "decision": "done",
                         "details": {"export": export_id, "grant": grant.grant_id,
                                     "recipient": recipient, "participants": len(members)}}, at)
        head = ctx.audit.sign_head(ctx.signer, at)
        clash = set(body) & _STANDARD_FIELDS
        if clash:
            raise ValueError(f"manifest body may not set {sorted(clash)}")
        full = {
            **body,
            "format": "mindward-export-manifest/1", "export_id": export_id, "kind": kind,
            "vault_id": ctx.vault_id, "purpose": grant.purpose, "recipient": recipient,
            "created_at": at, "expires_at": expires, "policy_version": grant.policy_version,
            "consent_digest": grant.consent_digest, "grant": grant.grant_id,
            "cohort_size": len(members),
            **({"pseudonyms": sorted(members.values())} if list_pseudonyms else {}),
            "audit_tree_head": head.to_dict(), "cautions": list(CAUTIONS),
        }
        signed = manifest.sign(ctx.signer, manifest.MANIFEST, full)
        lineage.record_export(ctx.conn, export_id=export_id, kind=kind, purpose=grant.purpose,
                              recipient=recipient, at=at, expires=expires,
                              kept=storage_json(kept_copy(signed)), digest=manifest.digest(full),
                              members=members)
        export_runs.mark_signed(ctx, export_id, storage_json(signed))
    return signed


def kept_copy(signed: Mapping[str, Any]) -> dict[str, Any]:
    """The manifest as the vault keeps it: an item list only as its SHA-256 (policies never
    need it; `manifest_digest` still covers the signed body with the list)."""
    body = dict(signed["body"])
    items = body.get("items")
    if isinstance(items, dict) and "ids" in items:
        ids = "\n".join(items["ids"]).encode()
        body["items"] = {**{k: x for k, x in items.items() if k != "ids"},
                         "ids_sha256": crypto.sha256_hex(ids)}
    return {**signed, "body": body}


_STANDARD_FIELDS = frozenset({
    "format", "export_id", "kind", "vault_id", "purpose", "recipient", "created_at", "expires_at",
    "policy_version", "consent_digest", "grant", "cohort_size", "pseudonyms", "audit_tree_head",
    "cautions"})


def storage_json(doc: Mapping[str, Any]) -> bytes:
    from vault.audit.log import canonical_json

    return canonical_json(dict(doc))


def check_export(ctx: Context, document: Mapping[str, Any]) -> dict[str, Any]:
    """Does an export someone holds still stand? Names counts, never who."""
    now = ctx.now()
    if not manifest.verify(document, ctx.public_key, manifest.MANIFEST):
        raise IntegrityError("the manifest's signature does not verify with this vault's key")
    body = document["body"]
    if body.get("vault_id") != ctx.vault_id:
        raise IntegrityError("the manifest belongs to another vault")
    export_id = str(body.get("export_id"))
    terms = lineage.export_terms(ctx.conn, export_id)
    if terms is None:
        raise NotFound(f"no export '{export_id}' in this vault's lineage")
    purpose, expires_at = terms
    members = lineage.member_list(ctx.conn, export_id)
    consents = registry.latest_consents(ctx.conn, members)
    erased = [pid for pid in members if pid not in consents]
    chain = ctx.policy.chain(purpose) if purpose in ctx.policy.purposes else (purpose,)
    lapsed = [pid for pid, consent in consents.items() if not permits_purpose(consent, chain, now)]
    expired = iso_utc(now) >= expires_at
    replace = bool(erased or lapsed or expired)
    return {"export_id": export_id, "purpose": purpose, "participants": len(members),
            "withdrawn_or_erased": len(erased), "consent_no_longer_covers": len(lapsed),
            "export_expired": expired, "must_replace": replace}
