"""The decision function: may this request touch these participants' data?

Pure: a policy set, a request, the current consent version of each participant,
the time and (for releases that spend privacy budget) each participant's remaining
budget go in; a `CohortDecision` comes out. Nothing is read or written.

Deny by default. Request-wide rules are checked first (role, purpose, categories,
special-category basis, export limits); if any fails, no consent is even looked
at. Otherwise each participant is permitted only when every rule allows it:
an answer for the requested purpose or a broader one (the nearest answer wins);
a status that permits processing (`given`/`renewed`), not expired at `now`;
every requested category granted, and for derived data also what it is derived
from (derived data inherits its recording's consent scope); explicit consent
where the purpose relies on GDPR Art. 9(2)(a) for special-category data or data
derived from it; enough budget. A cohort request is then refused as a whole when
fewer than the purpose's minimum cohort remain.

Speed: the request-wide work is done once; each participant costs a few dict
lookups and one subset test (see `bench_decide`).
"""

from __future__ import annotations

import datetime as dt
import time
from array import array
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from enum import StrEnum
from types import MappingProxyType
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StringConstraints, ValidationError

from vault import crypto
from vault.errors import UsageError
from vault.policy.consent import PERMITTING, ConsentStatus, ConsentVersion, answer_for
from vault.policy.policyset import ART9_EXPLICIT_CONSENT, PolicySet, safe_id

CONSENT_DIGEST_DOMAIN = b"mindward/v1/decision-consents\n"


class Reason(StrEnum):
    """Why a request or a participant was refused. The values are stable."""

    # request-wide
    ROLE_NOT_ALLOWED = "role-not-allowed"
    UNKNOWN_PURPOSE = "unknown-purpose"
    UNKNOWN_CATEGORY = "unknown-category"
    PURPOSE_NOT_ALLOWED_CATEGORY = "purpose-not-allowed-category"
    SPECIAL_CATEGORY_BASIS_MISSING = "special-category-basis-missing"  # also per participant
    DP_NOISE_REQUIRED = "dp-noise-required"
    RELEASE_EPSILON_EXCEEDS_CAP = "release-epsilon-exceeds-cap"
    PRIVACY_UNIT_NOT_ALLOWED = "privacy-unit-not-allowed"
    RECIPIENT_REQUIRED = "recipient-required"
    RECIPIENT_NOT_ALLOWED = "recipient-not-allowed"
    COHORT_TOO_SMALL = "cohort-too-small"
    # per participant
    UNKNOWN_PARTICIPANT = "unknown-participant"
    NO_CONSENT_FOR_PURPOSE = "no-consent-for-purpose"
    CONSENT_REFUSED = "consent-refused"
    CONSENT_WITHDRAWN = "consent-withdrawn"
    CONSENT_REVOKED = "consent-revoked"
    CONSENT_INVALIDATED = "consent-invalidated"
    CONSENT_EXPIRED = "consent-expired"
    CATEGORY_NOT_GRANTED = "category-not-granted"
    BUDGET_EXHAUSTED = "budget-exhausted"  # also request-wide when the purpose says "refuse"


REASON_TEXT: Mapping[Reason, str] = {
    Reason.ROLE_NOT_ALLOWED: "the role may not invoke this purpose",
    Reason.UNKNOWN_PURPOSE: "the policy set defines no such purpose",
    Reason.UNKNOWN_CATEGORY: "the policy set defines no such category",
    Reason.PURPOSE_NOT_ALLOWED_CATEGORY: "the purpose may never touch a requested category",
    Reason.SPECIAL_CATEGORY_BASIS_MISSING:
        "special-category data without its GDPR Art. 9(2) condition (or explicit consent)",
    Reason.DP_NOISE_REQUIRED: "exports for this purpose must carry differential-privacy noise",
    Reason.RELEASE_EPSILON_EXCEEDS_CAP: "epsilon exceeds the purpose's per-release budget",
    Reason.PRIVACY_UNIT_NOT_ALLOWED: "the purpose does not allow per-rating privacy units",
    Reason.RECIPIENT_REQUIRED: "the purpose needs a named recipient",
    Reason.RECIPIENT_NOT_ALLOWED: "the recipient is not allowed for this purpose",
    Reason.COHORT_TOO_SMALL: "fewer participants than the purpose's minimum cohort",
    Reason.UNKNOWN_PARTICIPANT: "no such participant",
    Reason.NO_CONSENT_FOR_PURPOSE: "no consent for this purpose",
    Reason.CONSENT_REFUSED: "consent refused",
    Reason.CONSENT_WITHDRAWN: "consent withdrawn",
    Reason.CONSENT_REVOKED: "consent revoked by the lab",
    Reason.CONSENT_INVALIDATED: "consent invalidated",
    Reason.CONSENT_EXPIRED: "consent expired",
    Reason.CATEGORY_NOT_GRANTED: "a requested category is not granted",
    Reason.BUDGET_EXHAUSTED: "privacy budget exhausted",
}

_STATUS_REASON: Mapping[ConsentStatus, Reason] = {
    ConsentStatus.REFUSED: Reason.CONSENT_REFUSED,
    ConsentStatus.WITHDRAWN: Reason.CONSENT_WITHDRAWN,
    ConsentStatus.REVOKED: Reason.CONSENT_REVOKED,
    ConsentStatus.INVALIDATED: Reason.CONSENT_INVALIDATED,
    ConsentStatus.EXPIRED: Reason.CONSENT_EXPIRED,
}

Text = Annotated[str, StringConstraints(min_length=1, max_length=200)]


class Request(BaseModel):
    """What someone asks for. `cohort` requests (exports, aggregates) enforce the
    purpose's minimum cohort; `export` requests enforce its noise and recipient rules;
    `epsilon` is the budget the release would spend per participant."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    actor: Text
    role: Text
    purpose: Text
    categories: frozenset[Text] = Field(min_length=1)
    participants: tuple[str, ...] | None = None  # None: every participant given to decide()
    cohort: bool = True
    export: bool = False
    epsilon: Annotated[float, Field(gt=0, allow_inf_nan=False)] | None = None
    privacy_unit: Literal["participant", "rating"] = "participant"
    recipient: Text | None = None

    def __init__(self, **data: Any) -> None:
        try:
            super().__init__(**data)
        except ValidationError as exc:
            first = exc.errors(include_input=False, include_url=False)[0]
            where = ".".join(str(p) for p in first.get("loc", ())) or "request"
            raise UsageError(f"request: {where}: {first.get('msg', 'invalid')}") from None


@dataclass(frozen=True, slots=True)
class Decision:
    """Per participant: permitted, or the reasons for refusal."""

    permit: bool
    reasons: tuple[Reason, ...]

    def explain(self) -> str:
        if self.permit:
            return "permitted"
        return "refused: " + "; ".join(f"{r.value} ({REASON_TEXT[r]})" for r in self.reasons)


PERMIT = Decision(True, ())
_INTERNED: dict[tuple[Reason, ...], Decision] = {(): PERMIT}


def _refusal(reasons: tuple[Reason, ...]) -> Decision:
    found = _INTERNED.get(reasons)
    if found is None:
        found = _INTERNED.setdefault(reasons, Decision(False, reasons))
    return found


@dataclass(frozen=True)
class CohortDecision:
    """The outcome for a whole request, plus what a grant must name."""

    request: Request
    policy_version: str
    decided_at: dt.datetime
    permit: bool
    cohort_reasons: tuple[Reason, ...]
    decisions: Mapping[str, Decision] = field(repr=False)
    eligible: tuple[str, ...] = field(repr=False)  # individually permitted, request order
    counts: Mapping[str, int]  # reason value -> participants refused for it (no ids)
    consent_digest: str | None  # see consent_digest(); None when no consent was read

    @property
    def included(self) -> tuple[str, ...]:
        """Who the grant may cover: the eligible participants, or nobody if refused."""
        return self.eligible if self.permit else ()

    def refusal_message(self) -> str:
        """One line for a refused request: reasons and counts, never participant ids."""
        if self.permit:
            return "permitted"
        parts = [f"{r.value} ({REASON_TEXT[r]})" for r in self.cohort_reasons]
        if Reason.COHORT_TOO_SMALL in self.cohort_reasons:
            parts[self.cohort_reasons.index(Reason.COHORT_TOO_SMALL)] += (
                f" [{len(self.eligible)} eligible]")
        per = ", ".join(f"{name}: {n}" for name, n in sorted(self.counts.items())
                        if name not in {r.value for r in self.cohort_reasons})
        tail = f"; participants refused by reason: {per}" if per else ""
        return (f"refused: purpose {safe_id(self.request.purpose)}: " + "; ".join(parts) + tail)


def _aware(now: dt.datetime) -> None:
    if not isinstance(now, dt.datetime) or now.tzinfo is None:
        raise UsageError("now must be a datetime with a time zone")


def request_reasons(policy: PolicySet, request: Request) -> tuple[Reason, ...]:
    """The request-wide refusals (empty when the request as such may proceed)."""
    reasons: list[Reason] = []
    purpose = policy.purposes.get(request.purpose)
    role = policy.roles.get(request.role)
    if role is None or not role.reads_data or (purpose is not None
                                                and request.role not in purpose.roles):
        reasons.append(Reason.ROLE_NOT_ALLOWED)
    if purpose is None:
        reasons.append(Reason.UNKNOWN_PURPOSE)
        if any(c not in policy.categories for c in request.categories):
            reasons.append(Reason.UNKNOWN_CATEGORY)
        return tuple(reasons)
    if any(c not in policy.categories for c in request.categories):
        reasons.append(Reason.UNKNOWN_CATEGORY)
    if any(c in policy.categories and c not in purpose.categories for c in request.categories):
        reasons.append(Reason.PURPOSE_NOT_ALLOWED_CATEGORY)
    if purpose.special_category and purpose.special_category_basis is None:
        reasons.append(Reason.SPECIAL_CATEGORY_BASIS_MISSING)
    if request.export and purpose.dp_required and request.epsilon is None:
        reasons.append(Reason.DP_NOISE_REQUIRED)
    if (request.epsilon is not None and purpose.epsilon_per_release is not None
            and request.epsilon > purpose.epsilon_per_release):
        reasons.append(Reason.RELEASE_EPSILON_EXCEEDS_CAP)
    if request.privacy_unit == "rating" and not purpose.per_rating_unit_allowed:
        reasons.append(Reason.PRIVACY_UNIT_NOT_ALLOWED)
    if purpose.requires_recipient and request.recipient is None:
        reasons.append(Reason.RECIPIENT_REQUIRED)
    if request.recipient is not None and (
            not purpose.requires_recipient
            or (purpose.recipients and request.recipient not in purpose.recipients)):
        reasons.append(Reason.RECIPIENT_NOT_ALLOWED)
    return tuple(reasons)


def consent_digest(pids: tuple[str, ...], numbers: Sequence[int]) -> str:
    """SHA-256 over the participant ids (request order) and the number of the consent
    version each was decided on (0: none). Verified consent chains make a number
    name exactly one version."""
    ids = "\n".join(pids).encode("utf-8")
    body = len(ids).to_bytes(8, "big") + ids + array("q", numbers).tobytes()
    return crypto.sha256_hex(CONSENT_DIGEST_DOMAIN + body)


_MISSING: Any = object()


def decide(policy: PolicySet, request: Request,
           consents: Mapping[str, ConsentVersion | None], *, now: dt.datetime,
           budget_remaining: Mapping[str, float] | None = None) -> CohortDecision:
    """Decide `request` for every participant it names (or every key of `consents`).

    `consents` maps participant id -> current consent version (None: enrolled but
    no consent on record). A participant the request names but `consents` lacks is
    'unknown-participant'. When the request spends `epsilon`, `budget_remaining`
    must give each participant's remaining budget for the purpose; a participant
    it omits counts as having none left.
    """
    _aware(now)
    named = request.participants
    pids = tuple(consents) if named is None else tuple(dict.fromkeys(named))
    cohort = request_reasons(policy, request)
    base: dict[str, Any] = dict(request=request, policy_version=policy.version, decided_at=now)
    if cohort:
        base["consent_digest"] = None  # refused before any consent was read
        refused = _refusal(cohort)
        counts = {r.value: len(pids) for r in cohort}
        return CohortDecision(permit=False, cohort_reasons=cohort,
                              decisions=MappingProxyType(dict.fromkeys(pids, refused)),
                              eligible=(), counts=MappingProxyType(counts), **base)
    epsilon = request.epsilon
    if epsilon is not None and budget_remaining is None:
        raise UsageError("a release that spends epsilon needs the participants' remaining budget")
    purpose = policy.purposes[request.purpose]
    decisions, eligible, numbers, budget_only = _decide_each(policy, request, consents, pids,
                                                             now, budget_remaining)
    base["consent_digest"] = consent_digest(pids, numbers)
    counts: dict[str, int] = {}
    tally = Counter(map(id, decisions.values()))
    for d in list(_INTERNED.values()):
        n = tally.get(id(d))
        if n:
            for r in d.reasons:
                counts[r.value] = counts.get(r.value, 0) + n
    reasons: list[Reason] = []
    if budget_only and purpose.on_budget_exceeded == "refuse":
        reasons.append(Reason.BUDGET_EXHAUSTED)
    if request.cohort and len(eligible) < purpose.min_cohort:
        reasons.append(Reason.COHORT_TOO_SMALL)
    return CohortDecision(permit=not reasons, cohort_reasons=tuple(reasons),
                          decisions=MappingProxyType(decisions), eligible=tuple(eligible),
                          counts=MappingProxyType(counts), **base)


def _decide_each(policy: PolicySet, request: Request,
                 consents: Mapping[str, ConsentVersion | None], pids: tuple[str, ...],
                 now: dt.datetime, budget_remaining: Mapping[str, float] | None,
                 ) -> tuple[dict[str, Decision], list[str], list[int], int]:
    purpose = policy.purposes[request.purpose]
    chain = policy.chain(request.purpose)
    wanted = policy.consent_scope(request.categories)  # derived data needs its source too
    need_explicit = (purpose.special_category_basis == ART9_EXPLICIT_CONSENT
                     and not wanted.isdisjoint(policy.special_categories()))
    epsilon = request.epsilon
    budget = budget_remaining if budget_remaining is not None else {}
    unknown = _refusal((Reason.UNKNOWN_PARTICIPANT,))
    no_consent = _refusal((Reason.NO_CONSENT_FOR_PURPOSE,))
    expired = _refusal((Reason.CONSENT_EXPIRED,))
    by_status = {s: _refusal((r,)) for s, r in _STATUS_REASON.items()}
    only_budget = _refusal((Reason.BUDGET_EXHAUSTED,))
    cat, special, spent = (Reason.CATEGORY_NOT_GRANTED, Reason.SPECIAL_CATEGORY_BASIS_MISSING,
                           Reason.BUDGET_EXHAUSTED)
    permitting = PERMITTING
    decisions: dict[str, Decision] = {}
    eligible: list[str] = []
    numbers: list[int] = []
    number = numbers.append
    get = consents.get
    budget_only = 0
    for pid in pids:
        cv = get(pid, _MISSING)
        if cv is _MISSING:
            decisions[pid] = unknown
            number(0)
            continue
        if cv is None:
            decisions[pid] = no_consent
            number(0)
            continue
        number(cv.number)
        entry = answer_for(cv, chain)
        if entry is None:
            decisions[pid] = no_consent
            continue
        status = entry.status
        if status not in permitting:
            decisions[pid] = by_status[status]
            continue
        if cv.ends_at <= now:
            decisions[pid] = expired
            continue
        if (wanted <= entry.categories and (not need_explicit or entry.explicit)
                and (epsilon is None or budget.get(pid, 0.0) >= epsilon)):
            decisions[pid] = PERMIT
            eligible.append(pid)
            continue
        reasons: tuple[Reason, ...] = ()
        if not wanted <= entry.categories:
            reasons += (cat,)
        if need_explicit and not entry.explicit:
            reasons += (special,)
        if epsilon is not None and not budget.get(pid, 0.0) >= epsilon:
            reasons += (spent,)
        d = _refusal(reasons)
        decisions[pid] = d
        if d is only_budget:
            budget_only += 1
    return decisions, eligible, numbers, budget_only


# --------------------------------------------------------------------------- benchmark


def synthetic_cohort(n: int) -> tuple[PolicySet, Request, dict[str, ConsentVersion | None],
                                      dict[str, float], dt.datetime]:
    """`n` synthetic participants over four shared consent variants (benchmarks only)."""
    from vault.policy.consent import ConsentTerms, record_consent
    from vault.policy.policyset import load_default_policy

    policy = load_default_policy()
    at = dt.datetime(2026, 6, 15, 12, tzinfo=dt.UTC)
    variants = []
    for grant_rec in (True, False):
        for expires in (dt.date(2031, 3, 1), dt.date(2026, 6, 1)):
            answers = {
                "primary-analysis": {"granted": ["eeg-raw", "scores-derived", "ratings-explicit",
                                                 "demographics"], "explicit": True},
                "recommender-training": {"granted": ["eeg-raw", "scores-derived",
                                                     "ratings-explicit"] if grant_rec else []},
            }
            terms = ConsentTerms.model_validate({
                "form_version": policy.meta.form_versions[0], "signed": dt.date(2026, 3, 2),
                "expires": expires, "purposes": answers})
            variants.append(record_consent(terms, policy, participant_id=crypto.random_id(16),
                                           recorded_at=at))
    pids = [f"{i:032x}" for i in range(n)]
    consents: dict[str, ConsentVersion | None] = {
        pid: (None if i % 50 == 0 else variants[i % len(variants)]) for i, pid in enumerate(pids)}
    request = Request(actor="bench", role="analyst", purpose="recommender-training/canteen-menu",
                      categories=frozenset({"scores-derived", "ratings-explicit"}), export=True,
                      epsilon=0.25)
    return policy, request, consents, dict.fromkeys(pids, 1.0), at


def bench_decide(n: int = 100_000, *, repeat: int = 3) -> dict[str, float]:
    """Time `decide` for a cohort of `n` synthetic participants against a baseline.

    The baseline is a bare loop doing one dict lookup and one dict store per
    participant (the least any decision needs), measured in the same run.
    Returns seconds (best of `repeat`), decisions per second and the ratio.
    """
    policy, request, consents, budget, at = synthetic_cohort(n)
    pids = list(consents)
    best, base = float("inf"), float("inf")
    result = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        result = decide(policy, request, consents, now=at, budget_remaining=budget)
        best = min(best, time.perf_counter() - t0)
        t0 = time.perf_counter()
        out = {}
        for pid in pids:
            out[pid] = consents.get(pid)
        base = min(base, time.perf_counter() - t0)
    assert result is not None
    return {
        "participants": float(n),
        "seconds": best,
        "decisions_per_second": n / best,
        "baseline_seconds": base,
        "ratio_to_baseline": best / base,
        "eligible": float(len(result.eligible)),
        "meets_target": float(n / best >= 100_000),
    }
