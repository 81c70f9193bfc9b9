"""`mindward report`: a record of processing (in the style of GDPR Art. 30) from the vault's state.

Counts and definitions only: no participant ids, no identities, no values.
It is a starting point for the lab's own record, not a legal document.
"""

from __future__ import annotations

import datetime as dt
from fractions import Fraction
from typing import TYPE_CHECKING, Any

from vault.storage import registry

if TYPE_CHECKING:
    from vault.api import Vault

CAUTION = ("This record is generated from the vault's state as a starting point for the lab's "
           "record of processing activities (GDPR Art. 30). It is not legal advice; complete and "
           "check it with your data-protection officer and ethics board.")


def _nearest_permits(consent: Any, chain: tuple[str, ...]) -> bool:
    """The narrowest answered purpose at or above the requested one decides (as in decide.py)."""
    for purpose in chain:
        entry = consent.purposes.get(purpose)
        if entry is not None:
            return bool(entry.permits)
    return False


def _count(v: Vault, sql: str, *args: object) -> int:
    return int(v._conn.execute(sql, args).fetchone()[0])


def record_of_processing(v: Vault) -> dict[str, Any]:
    v._require_steward("report")
    now = v.now()
    policy = v.policy
    consents = registry.latest_consents(v._conn, None)
    purposes = []
    for pid, purpose in sorted(policy.purposes.items()):
        permitting = sum(1 for c in consents.values() if c is not None and not c.is_expired(now)
                         and _nearest_permits(c, policy.chain(pid)))
        spent = [Fraction(r[0]) for r in v._conn.execute(
            "SELECT epsilon FROM budget_ledger WHERE purpose = ?", (pid,))]
        purposes.append({
            "purpose": pid, "title": purpose.title, "dpv": purpose.dpv,
            "lawful_basis": purpose.lawful_basis, "special_category": purpose.special_category,
            "special_category_basis": purpose.special_category_basis,
            "categories": list(purpose.categories), "roles": list(purpose.roles),
            "dp_required": purpose.dp_required,
            "epsilon_per_participant": purpose.epsilon_per_participant,
            "participants_with_consent_now": permitting,
            "participants_charged": len(spent),
            "max_epsilon_spent": float(max(spent)) if spent else 0.0,
        })
    recipients = [dict(zip(("recipient", "purpose", "kind", "exports", "last"), r, strict=True))
                  for r in v._conn.execute(
                      "SELECT recipient, purpose, kind, COUNT(*), MAX(created_at) FROM exports "
                      "GROUP BY recipient, purpose, kind ORDER BY recipient, purpose")]
    open_requests = v._conn.execute(
        "SELECT COUNT(*), SUM(deadline < ?) FROM withdrawals WHERE status = 'pending'",
        (now.strftime("%Y-%m-%d"),)).fetchone()
    return {
        "generated_at": now.astimezone(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "vault_id": v.vault_id, "policy": {"name": policy.meta.name, "title": policy.meta.title,
                                           "version": policy.version},
        "categories": [{"category": c, "title": cat.title, "special_category": cat.special_category}
                       for c, cat in sorted(policy.categories.items())],
        "purposes": purposes,
        "participants": {
            "enrolled": _count(v, "SELECT COUNT(*) FROM participants"),
            "active": _count(v, "SELECT COUNT(*) FROM participants WHERE wrapped_key IS NOT NULL"),
            "erased": _count(v, "SELECT COUNT(*) FROM participants WHERE wrapped_key IS NULL"),
            "consent_expired": sum(1 for c in consents.values() if c is not None and c.is_expired(now)),
        },
        "data": {"recordings": _count(v, "SELECT COUNT(*) FROM recordings"),
                 "score_batches": _count(v, "SELECT COUNT(*) FROM score_batches")},
        "retention": {"withdrawal_deadline_days": policy.meta.withdrawal_deadline_days,
                      "consent_ends": "each consent ends at its expiry or retention end, "
                                      "whichever is first, without anyone acting"},
        "recipients": recipients,
        "withdrawals": {"open": int(open_requests[0] or 0), "overdue": int(open_requests[1] or 0),
                        "processed": _count(v, "SELECT COUNT(*) FROM withdrawals WHERE "
                                               "status != 'pending'")},
        "security": ["AES-256-GCM (C2SP chunked encryption) per-participant keys",
                     "Argon2id (RFC 9106) passphrase keys", "signed RFC 9162 Merkle audit log",
                     "purpose-bound grants checked at every read"],
        "caution": CAUTION,
    }
