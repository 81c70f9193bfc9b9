"""The policy engine: the only place a `Grant` is minted.

A grant names actor, role, purpose, categories, the participants it covers, its
expiry, and the policy and consent versions it was decided on. The store's
read path takes a grant and asks it to `admit` each read; admission re-decides
that participant against their consent as it is *now*, so a withdrawal takes
effect at once, even for a grant minted before it. The one shortcut: a read at
the very instant the grant was decided, while the vault's database shows no
change at all since then (by anyone: `StateToken`), is admitted on that
decision, because deciding again on the same inputs could only agree (the live
check asks strictly less than the minting decision did).

Grants cannot be built outside this module (they need `_MINT`), pickled, or
copied; `tests/test_architecture.py` checks that no other module names `_MINT`.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from vault import crypto
from vault.consent import ConsentVersion
from vault.decide import CohortDecision, Request, decide
from vault.errors import PolicyRefusal
from vault.policyset import PolicySet

_MINT = object()
GRANT_LIFETIME = dt.timedelta(minutes=30)
AUDIT_CHUNK = 1000  # subjects per audit entry: one batch of entries per decision

ConsentLoader = Callable[[Sequence[str] | None], Mapping[str, ConsentVersion | None]]
AuditSink = Callable[[list[dict[str, Any]], dt.datetime], None]
# A value that changes whenever anything is written to the vault's database, by this process
# or any other (the vault passes SQLite's data_version and its connection's change count).
StateToken = Callable[[], object]


class Grant:
    """Permission to decrypt named categories of named participants for one purpose."""

    __slots__ = ("_admitted", "_engine", "_state", "actor", "categories", "consent_digest",
                 "counts", "decided_at", "expires_at", "grant_id", "participants", "policy_version",
                 "purpose", "request", "role")

    def __init__(self, mint: object, *, engine: PolicyEngine, decision: CohortDecision,
                 grant_id: str) -> None:
        if mint is not _MINT:
            raise PolicyRefusal("grants are issued only by the policy engine")
        request = decision.request
        self._engine = engine
        self.grant_id = grant_id
        self.request = request
        self.actor = request.actor
        self.role = request.role
        self.purpose = request.purpose
        self.categories = frozenset(request.categories)
        self.participants = frozenset(decision.included)
        self.policy_version = decision.policy_version
        self.consent_digest = decision.consent_digest
        self.decided_at = decision.decided_at
        self.expires_at = decision.decided_at + GRANT_LIFETIME
        self.counts = dict(decision.counts)  # refusals by reason, no ids
        self._admitted: set[tuple[str, str, dt.datetime]] = set()
        self._state: object = None  # the database's state token once the grant was recorded

    def __reduce__(self) -> object:
        raise TypeError("grants are not serialisable")

    def __copy__(self) -> Grant:
        raise TypeError("grants cannot be copied")

    __deepcopy__ = __copy__

    def admit(self, pid: str, category: str, *, now: dt.datetime) -> None:
        """Raise PolicyRefusal unless this grant covers reading `category` of `pid` now."""
        self._engine.admit(self, pid, category, now=now)

    def summary(self) -> dict[str, Any]:
        return {"grant": self.grant_id, "actor": self.actor, "role": self.role,
                "purpose": self.purpose, "categories": sorted(self.categories),
                "participants": len(self.participants), "policy_version": self.policy_version,
                "consent_digest": self.consent_digest,
                "expires_at": self.expires_at.strftime("%Y-%m-%dT%H:%M:%SZ")}


class PolicyEngine:
    """Decides requests against live consent, audits every outcome, mints grants."""

    def __init__(self, policy: PolicySet, consents: ConsentLoader, audit: AuditSink,
                 state: StateToken | None = None) -> None:
        self.policy = policy
        self._consents = consents
        self._audit = audit
        self._state = state
        self._revoked: set[str] = set()

    def decide(self, request: Request, *, now: dt.datetime,
               budget_remaining: Mapping[str, float] | None = None) -> CohortDecision:
        """Decide without granting (what `access check` shows); audited."""
        decision = decide(self.policy, request, self._consents(request.participants), now=now,
                          budget_remaining=budget_remaining)
        self._audit(decision_entries(decision, action="access.check"), now)
        return decision

    def authorize(self, request: Request, *, now: dt.datetime,
                  budget_remaining: Mapping[str, float] | None = None) -> Grant:
        """A grant for the permitted participants, or PolicyRefusal with counted reasons."""
        decision = decide(self.policy, request, self._consents(request.participants), now=now,
                          budget_remaining=budget_remaining)
        grant_id = "g-" + crypto.random_id(8)
        self._audit(decision_entries(decision, action="access.grant", grant_id=grant_id), now)
        if not decision.permit:
            raise PolicyRefusal(decision.refusal_message())
        grant = Grant(_MINT, engine=self, decision=decision, grant_id=grant_id)
        if self._state is not None:
            grant._state = self._state()
        return grant

    def admit(self, grant: Grant, pid: str, category: str, *, now: dt.datetime) -> None:
        why = self._why_not(grant, pid, category, now)
        if why is not None:
            self._audit([{"actor": grant.actor, "action": "access.read", "decision": "refuse",
                          "purpose": grant.purpose, "subjects": [pid], "reasons": [why],
                          "details": {"grant": grant.grant_id, "category": category}}], now)
            raise PolicyRefusal(f"read refused: {why}")

    def _why_not(self, grant: Grant, pid: str, category: str, now: dt.datetime) -> str | None:
        static = self._static_refusal(grant, pid, category, now)
        if static is not None:
            return static
        if (pid, category, now) in grant._admitted:
            return None
        return self._live_refusals(grant, (pid,), now).get(pid)

    def _unchanged_since_decision(self, grant: Grant, now: dt.datetime) -> bool:
        """The same instant and not one write to the database since the grant was recorded:
        a live decision would see the minting decision's inputs again."""
        return (self._state is not None and grant._state is not None and now == grant.decided_at
                and self._state() == grant._state)

    def _live_refusals(self, grant: Grant, pids: tuple[str, ...], now: dt.datetime) -> dict[str, str]:
        """Re-decide `pids` against their consent now (budget and export rules were settled
        when the grant was minted); returns pid -> first reason for those now refused.

        Every pid here is in the grant, so each was permitted by the minting decision, which
        asked all the live check asks and more: with unchanged inputs nobody can be refused."""
        if self._unchanged_since_decision(grant, now):
            return {}
        live = decide(self.policy, grant.request.model_copy(update={
            "participants": pids, "cohort": False, "epsilon": None, "export": False}),
            self._consents(pids), now=now)
        refused = {}
        for pid in pids:
            verdict = live.decisions.get(pid)
            if verdict is None or not verdict.permit:
                refused[pid] = (verdict.reasons[0].value if verdict and verdict.reasons
                                else "not-permitted-now")
        return refused

    def admit_many(self, grant: Grant, reads: list[tuple[str, str]], *, now: dt.datetime) -> None:
        """Admit many (participant, category) reads with one live decision; refusals audited."""
        for pid, category in reads:
            why = self._static_refusal(grant, pid, category, now)
            if why is not None:
                self.admit(grant, pid, category, now=now)  # audits and raises
        pids = tuple(sorted({pid for pid, _ in reads}))
        refused = self._live_refusals(grant, pids, now)
        if refused:
            self._audit([{"actor": grant.actor, "action": "access.read", "decision": "refuse",
                          "purpose": grant.purpose, "subjects": sorted(refused),
                          "reasons": sorted(set(refused.values())),
                          "details": {"grant": grant.grant_id}}], now)
            raise PolicyRefusal(f"read refused for {len(refused)} participant(s): "
                                + ", ".join(sorted(set(refused.values()))))
        grant._admitted = {(pid, category, now) for pid, category in reads}

    def _static_refusal(self, grant: Grant, pid: str, category: str, now: dt.datetime) -> str | None:
        if grant._engine is not self or grant.grant_id in self._revoked:
            return "grant-not-valid-here"
        if now >= grant.expires_at:
            return "grant-expired"
        if pid not in grant.participants:
            return "participant-not-in-grant"
        if category not in grant.categories:
            return "category-not-in-grant"
        return None

    def revoke(self, grant: Grant) -> None:
        self._revoked.add(grant.grant_id)


def decision_entries(decision: CohortDecision, *, action: str,
                     grant_id: str | None = None) -> list[dict[str, Any]]:
    """Audit entries for a decision: who was permitted or refused and why, in chunks."""
    request = decision.request
    base: dict[str, Any] = {
        "actor": request.actor, "action": action, "purpose": request.purpose,
        "decision": "permit" if decision.permit else "refuse",
        "reasons": [r.value for r in decision.cohort_reasons],
        "details": {"role": request.role, "categories": sorted(request.categories),
                    "policy_version": decision.policy_version,
                    "consent_digest": decision.consent_digest, "counts": dict(decision.counts),
                    **({"grant": grant_id} if grant_id else {}),
                    **({"epsilon": request.epsilon} if request.epsilon is not None else {}),
                    **({"recipient": request.recipient} if request.recipient else {})},
    }
    by_outcome: dict[str, list[str]] = {}
    for pid, verdict in decision.decisions.items():
        key = "permit" if verdict.permit else ",".join(r.value for r in verdict.reasons)
        by_outcome.setdefault(key, []).append(pid)
    entries: list[dict[str, Any]] = []
    for outcome, pids in sorted(by_outcome.items()):
        for start in range(0, len(pids), AUDIT_CHUNK):
            chunk = pids[start : start + AUDIT_CHUNK]
            entries.append({**base, "subjects": chunk, "outcome": outcome})
    return entries or [{**base, "subjects": []}]
