"""The policy engine: the only place a `Grant` is minted.

A grant is a handle: its fields (actor, role, purpose, categories, the participants
it covers, expiry, the policy and consent versions it was decided on, whether only
the noise mechanism may see its plaintext) live in a frozen record that the engine
keeps; the handle's attributes only read that record, so nothing a caller sets on a
grant changes what it allows. Every read re-decides: `admit_many` checks the grant's
own record (participant, category, expiry) and decides each participant again
against their consent as it is *now*, for exactly the categories being read, with the
engine's clock; a withdrawal takes effect at once, even for a grant minted before it.

Grants cannot be built outside this module (they need `_MINT`), pickled, or copied;
`tests/architecture/test_architecture.py` checks that no other module names `_MINT`.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any

from vault import crypto
from vault.errors import PolicyRefusal
from vault.policy.consent import ConsentVersion
from vault.policy.decide import CohortDecision, Request, decide
from vault.times import iso_utc

_MINT = object()
GRANT_LIFETIME = dt.timedelta(minutes=30)
AUDIT_CHUNK = 1000  # subjects per audit entry: one batch of entries per decision

ConsentLoader = Callable[[Sequence[str] | None], Mapping[str, ConsentVersion | None]]
AuditSink = Callable[[list[dict[str, Any]]], None]
Clock = Callable[[], dt.datetime]
Pseudonymiser = Callable[[str, Sequence[str]], Mapping[str, str]]


@dataclass(frozen=True, slots=True)
class GrantRecord:
    """What a grant allows, as decided; kept by the engine, never by the caller."""

    grant_id: str
    request: Request
    categories: frozenset[str]
    participants: frozenset[str]
    policy_version: str
    consent_digest: str | None
    decided_at: dt.datetime
    expires_at: dt.datetime
    counts: Mapping[str, int]
    noise_only: bool  # the purpose requires DP noise: plaintext goes to the mechanism alone


class Grant:
    """Permission to decrypt named categories of named participants for one purpose.

    Read-only: every attribute is looked up in the engine's record of the grant."""

    __slots__ = ("_engine", "_id")

    def __init__(self, mint: object, *, engine: PolicyEngine, grant_id: str) -> None:
        if mint is not _MINT:
            raise PolicyRefusal("grants are issued only by the policy engine")
        object.__setattr__(self, "_engine", engine)
        object.__setattr__(self, "_id", grant_id)

    def __setattr__(self, name: str, value: object) -> None:
        raise AttributeError("grants are read-only")

    def __delattr__(self, name: str) -> None:
        raise AttributeError("grants are read-only")

    def __reduce__(self) -> object:
        raise TypeError("grants are not serialisable")

    def __copy__(self) -> Grant:
        raise TypeError("grants cannot be copied")

    __deepcopy__ = __copy__

    @property
    def _record(self) -> GrantRecord:
        return self._engine.record(self)

    grant_id = property(lambda self: self._id)
    request = property(lambda self: self._record.request)
    actor = property(lambda self: self._record.request.actor)
    role = property(lambda self: self._record.request.role)
    purpose = property(lambda self: self._record.request.purpose)
    categories = property(lambda self: self._record.categories)
    @property
    def participants(self) -> frozenset[str]:
        """Who the grant covers: vault ids for stewards, per-purpose pseudonyms for others."""
        return self._engine.visible_participants(self._record)

    policy_version = property(lambda self: self._record.policy_version)
    consent_digest = property(lambda self: self._record.consent_digest)
    decided_at = property(lambda self: self._record.decided_at)
    expires_at = property(lambda self: self._record.expires_at)
    counts = property(lambda self: self._record.counts)
    noise_only = property(lambda self: self._record.noise_only)

    def issued_by(self, engine: PolicyEngine) -> bool:
        return self._engine is engine

    def summary(self) -> dict[str, Any]:
        r = self._record
        return {"grant": r.grant_id, "actor": r.request.actor, "role": r.request.role,
                "purpose": r.request.purpose, "categories": sorted(r.categories),
                "participants": len(r.participants), "policy_version": r.policy_version,
                "consent_digest": r.consent_digest,
                "expires_at": iso_utc(r.expires_at)}


class PolicyEngine:
    """Decides requests against live consent, audits every outcome, mints grants."""

    def __init__(self, policy: Any, consents: ConsentLoader, audit: AuditSink, clock: Clock,
                 pseudonymise: Pseudonymiser | None = None) -> None:
        self.policy = policy
        self._consents = consents
        self._audit = audit
        self._clock = clock
        self._pseudonymise = pseudonymise
        self._issued: dict[str, GrantRecord] = {}

    def visible_participants(self, record: GrantRecord) -> frozenset[str]:
        """A grant's participants as its holder may see them (only stewards see vault ids)."""
        if record.request.role == "steward" or self._pseudonymise is None:
            return record.participants
        return frozenset(self._pseudonymise(record.request.purpose, sorted(record.participants)).values())

    def record(self, grant: Grant) -> GrantRecord:
        found = (self._issued.get(grant.grant_id)
                 if isinstance(grant, Grant) and grant.issued_by(self) else None)
        if found is None:
            raise PolicyRefusal("this grant was not issued by this vault session")
        return found

    def decide(self, request: Request, *,
               affordable: Mapping[str, bool] | None = None) -> CohortDecision:
        """Decide without granting (what `access check` shows); audited."""
        decision = decide(self.policy, request, self._consents(request.participants),
                          now=self._clock(), affordable=affordable)
        self._audit(decision_entries(decision, action="access.check"))
        return decision

    def authorize(self, request: Request, *,
                  affordable: Mapping[str, bool] | None = None) -> Grant:
        """A grant for the permitted participants, or PolicyRefusal with counted reasons."""
        decision = decide(self.policy, request, self._consents(request.participants),
                          now=self._clock(), affordable=affordable)
        grant_id = "g-" + crypto.random_id(8)
        self._audit(decision_entries(decision, action="access.grant", grant_id=grant_id))
        if not decision.permit:
            raise PolicyRefusal(decision.refusal_message())
        purpose = self.policy.purposes[request.purpose]
        self._issued[grant_id] = GrantRecord(
            grant_id=grant_id, request=request, categories=frozenset(request.categories),
            participants=frozenset(decision.included), policy_version=decision.policy_version,
            consent_digest=decision.consent_digest, decided_at=decision.decided_at,
            expires_at=decision.decided_at + GRANT_LIFETIME,
            counts=MappingProxyType(dict(decision.counts)), noise_only=purpose.dp_required)
        return Grant(_MINT, engine=self, grant_id=grant_id)

    def admit_many(self, grant: Grant, reads: Sequence[tuple[str, str]], *,
                   for_noise: bool = False) -> Admission:
        """Admit (participant, category) reads now: the grant's own record, then one live
        decision for exactly those participants and categories. Refusals are audited."""
        record = self.record(grant)
        now = self._clock()
        refused: dict[str, str] = {}
        for pid, category in reads:
            why = _static_refusal(record, pid, category, now, for_noise)
            if why is not None:
                refused.setdefault(pid, why)
        if not refused and reads:
            refused = self._live_refusals(record, reads, now)
        if refused:
            self._audit([{"actor": record.request.actor, "action": "access.read",
                          "decision": "refuse", "purpose": record.request.purpose,
                          "subjects": sorted(refused), "reasons": sorted(set(refused.values())),
                          "details": {"grant": record.grant_id}}])
            raise PolicyRefusal(f"read refused for {len(refused)} participant(s): "
                                + ", ".join(sorted(set(refused.values()))))
        return Admission(_MINT, record, frozenset(reads))

    def _live_refusals(self, record: GrantRecord, reads: Sequence[tuple[str, str]],
                       now: dt.datetime) -> dict[str, str]:
        """Decide the readers' participants again against their consent now, for the
        categories actually read (budget and export rules were settled at minting)."""
        pids = tuple(sorted({pid for pid, _ in reads}))
        categories = frozenset(category for _, category in reads)
        live = decide(self.policy, record.request.model_copy(update={
            "participants": pids, "categories": categories, "cohort": False, "epsilon": None,
            "export": False}), self._consents(pids), now=now)
        refused = {}
        for pid in pids:
            verdict = live.decisions.get(pid)
            if verdict is None or not verdict.permit:
                refused[pid] = (verdict.reasons[0].value if verdict and verdict.reasons
                                else "not-permitted-now")
        return refused


class Admission:
    """The outcome of one `admit_many`: the (participant, category) reads the store may
    decrypt under the grant. Read-only, like the grant."""

    __slots__ = ("_reads", "_record")

    def __init__(self, mint: object, record: GrantRecord, reads: frozenset[tuple[str, str]]) -> None:
        if mint is not _MINT:
            raise PolicyRefusal("admissions are issued only by the policy engine")
        object.__setattr__(self, "_record", record)
        object.__setattr__(self, "_reads", reads)

    def __setattr__(self, name: str, value: object) -> None:
        raise AttributeError("admissions are read-only")

    @property
    def record(self) -> GrantRecord:
        return self._record

    def covers(self, pid: str, category: str) -> bool:
        return (pid, category) in self._reads

    def __reduce__(self) -> object:
        raise TypeError("admissions are not serialisable")


def _static_refusal(record: GrantRecord, pid: str, category: str, now: dt.datetime,
                    for_noise: bool) -> str | None:
    if record.noise_only and not for_noise:
        return "dp-noise-required"
    if now >= record.expires_at:
        return "grant-expired"
    if now < record.decided_at:
        return "clock-before-grant"
    if pid not in record.participants:
        return "participant-not-in-grant"
    if category not in record.categories:
        return "category-not-in-grant"
    return None


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
                    **({"epsilon": float(request.epsilon)} if request.epsilon is not None else {}),
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
