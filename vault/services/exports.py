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
from vault.services import export_runs
from vault.storage import db as storage
from vault.storage import registry

if TYPE_CHECKING:
    from vault.api import Vault
    from vault.policy.engine import Grant

PSEUDONYM_HEX = 20  # 80 bits: collisions are negligible for any study-sized cohort
DEFAULT_EXPORT_DAYS = 365
CAUTIONS = (
    "Pseudonymised data is still personal data (GDPR Recital 26): keep it under the data use "
    "agreement, do not try to re-identify anyone, and do not link it with other data.",
    "A participant may withdraw later; check this export with 'mindward export check' before "
    "each use and replace it when told to.",
    "Follow your ethics board's, data-protection officer's and local law's rules.",
)


def _at(moment: dt.datetime) -> str:
    return moment.astimezone(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def pseudonym(v: Vault, purpose: str, pid: str) -> str:
    key = v._keys.purpose_key("pseudonym", purpose)
    return crypto.hmac_sha256(key, pid.encode()).hex()[:PSEUDONYM_HEX]


def pseudonyms(v: Vault, purpose: str, pids: Iterable[str]) -> dict[str, str]:
    key = v._keys.purpose_key("pseudonym", purpose)
    return {pid: crypto.hmac_sha256(key, pid.encode()).hex()[:PSEUDONYM_HEX] for pid in pids}


def new_export_id() -> str:
    return "x-" + crypto.random_id(8)


def _sign_and_record(v: Vault, *, export_id: str, kind: str, grant: Grant, members: Mapping[str, str],
                    body: Mapping[str, Any],
                    expires_days: int = DEFAULT_EXPORT_DAYS,
                    list_pseudonyms: bool = True) -> dict[str, Any]:
    """Sign the manifest (with the audit tree head at release) and record the lineage.

    `members` maps internal participant id -> pseudonym in the export. One transaction
    holds the lineage rows, the audit entry and the tree head the manifest names.
    """
    now = v.now()
    at = _at(now)
    expires = _at(now + dt.timedelta(days=expires_days))
    recipient = grant.request.recipient or "internal"
    with storage.transaction(v._conn):
        v._audit.append({"actor": v.member, "action": f"export.{kind}", "purpose": grant.purpose,
                         "subjects": sorted(members), "decision": "done",
                         "details": {"export": export_id, "grant": grant.grant_id,
                                     "recipient": recipient, "participants": len(members)}}, at)
        head = v._audit.sign_head(v._signing, at)
        clash = set(body) & _STANDARD_FIELDS
        if clash:
            raise ValueError(f"manifest body may not set {sorted(clash)}")
        full = {
            **body,
            "format": "mindward-export-manifest/1", "export_id": export_id, "kind": kind,
            "vault_id": v.vault_id, "purpose": grant.purpose, "recipient": recipient,
            "created_at": at, "expires_at": expires, "policy_version": grant.policy_version,
            "consent_digest": grant.consent_digest, "grant": grant.grant_id,
            "cohort_size": len(members),
            **({"pseudonyms": sorted(members.values())} if list_pseudonyms else {}),
            "audit_tree_head": head.to_dict(), "cautions": list(CAUTIONS),
        }
        signed = manifest.sign(v._signing, manifest.MANIFEST, full)
        v._conn.execute(
            "INSERT INTO exports (export_id, kind, purpose, recipient, created_at, expires_at, "
            "manifest, manifest_digest) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            (export_id, kind, grant.purpose, recipient, at, expires,
             storage_json(kept_copy(signed)), manifest.digest(full)))
        export_runs.mark_signed(v, export_id, storage_json(signed))
        v._conn.executemany(
            "INSERT INTO export_members (export_id, pid, pseudonym) VALUES (?, ?, ?)",
            [(export_id, pid, alias) for pid, alias in members.items()])
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


def check_export(v: Vault, document: Mapping[str, Any]) -> dict[str, Any]:
    """Does an export someone holds still stand? Names counts, never who."""
    now = v.now()
    if not manifest.verify(document, v.public_key, manifest.MANIFEST):
        raise IntegrityError("the manifest's signature does not verify with this vault's key")
    body = document["body"]
    if body.get("vault_id") != v.vault_id:
        raise IntegrityError("the manifest belongs to another vault")
    export_id = str(body.get("export_id"))
    row = v._conn.execute("SELECT purpose, expires_at FROM exports WHERE export_id = ?",
                          (export_id,)).fetchone()
    if row is None:
        raise NotFound(f"no export '{export_id}' in this vault's lineage")
    purpose, expires_at = row
    members = [r[0] for r in v._conn.execute(
        "SELECT pid FROM export_members WHERE export_id = ?", (export_id,))]
    consents = registry.latest_consents(v._conn, members)
    erased = [pid for pid in members if pid not in consents]
    lapsed = []
    # the narrowest answered purpose at or above the export's decides, as in decide.py
    chain = v.policy.chain(purpose) if purpose in v.policy.purposes else (purpose,)
    for pid, consent in consents.items():
        answer = None if consent is None else next(
            (consent.purposes[p] for p in chain if p in consent.purposes), None)
        live = (consent is not None and not consent.is_expired(now) and answer is not None
                and answer.permits)
        if not live:
            lapsed.append(pid)
    expired = _at(now) >= expires_at
    replace = bool(erased or lapsed or expired)
    return {"export_id": export_id, "purpose": purpose, "participants": len(members),
            "withdrawn_or_erased": len(erased), "consent_no_longer_covers": len(lapsed),
            "export_expired": expired, "must_replace": replace}


def _exports_containing(v: Vault, pid: str) -> list[dict[str, str]]:
    """Earlier exports that included `pid`, with their recipients (GDPR Art. 19)."""
    rows = v._conn.execute(
        "SELECT e.export_id, e.kind, e.purpose, e.recipient, e.created_at FROM exports e "
        "JOIN export_members m ON m.export_id = e.export_id WHERE m.pid = ? ORDER BY e.created_at",
        (pid,)).fetchall()
    cols = ("export_id", "kind", "purpose", "recipient", "created_at")
    return [dict(zip(cols, r, strict=True)) for r in rows]
