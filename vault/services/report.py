"""`mindward report`: a record of processing (in the style of GDPR Art. 30) from the vault's state.

Counts and definitions only: no participant ids, no identities, no values.
It is a starting point for the lab's own record, not a legal document.
"""

from __future__ import annotations

from fractions import Fraction
from typing import TYPE_CHECKING, Any

from vault.policy.consent import permits_purpose
from vault.storage import counts, lineage, participants, registry
from vault.times import iso_utc

if TYPE_CHECKING:
    from vault.services.context import Context

CAUTION = ("This record is generated from the vault's state as a starting point for the lab's "
           "record of processing activities (GDPR Art. 30). It is not legal advice; complete and "
           "check it with your data-protection officer and ethics board.")


def record_of_processing(ctx: Context) -> dict[str, Any]:
    ctx.require_steward("report")
    now = ctx.now()
    policy = ctx.policy
    consents = registry.latest_consents(ctx.conn, None)
    purposes = []
    for pid, purpose in sorted(policy.purposes.items()):
        permitting = sum(1 for c in consents.values() if permits_purpose(c, policy.chain(pid), now))
        spent = [Fraction(e) for e in counts.spent(ctx.conn, pid)]
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
                  for r in lineage.recipients(ctx.conn)]
    open_requests, overdue, processed = counts.withdrawals(ctx.conn, now.strftime("%Y-%m-%d"))
    return {
        "generated_at": iso_utc(now),
        "vault_id": ctx.vault_id, "policy": {"name": policy.meta.name, "title": policy.meta.title,
                                           "version": policy.version},
        "categories": [{"category": c, "title": cat.title, "special_category": cat.special_category}
                       for c, cat in sorted(policy.categories.items())],
        "purposes": purposes,
        "participants": {
            "enrolled": counts.rows(ctx.conn, "participants"),
            "active": participants.count(ctx.conn),
            "erased": participants.count(ctx.conn, erased=True),
            "consent_expired": sum(1 for c in consents.values() if c is not None and c.is_expired(now)),
        },
        "data": {"recordings": counts.rows(ctx.conn, "recordings"),
                 "score_batches": counts.rows(ctx.conn, "score_batches")},
        "retention": {"withdrawal_deadline_days": policy.meta.withdrawal_deadline_days,
                      "consent_ends": "each consent ends at its expiry or retention end, "
                                      "whichever is first, without anyone acting"},
        "recipients": recipients,
        "withdrawals": {"open": open_requests, "overdue": overdue, "processed": processed},
        "security": ["AES-256-GCM (C2SP chunked encryption) per-participant keys",
                     "Argon2id (RFC 9106) passphrase keys", "signed RFC 9162 Merkle audit log",
                     "purpose-bound grants checked at every read"],
        "caution": CAUTION,
    }
