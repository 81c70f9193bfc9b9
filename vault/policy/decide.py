"""The decision function: may this request touch these participants' data?

Pure: a policy set, a request, the current consent version of each participant,
the time and (for releases that spend privacy budget) the exact accountant's verdict
on each participant's budget go in; a `CohortDecision` comes out. Nothing is read or written.

Deny by default. Request-wide rules are checked first (role, purpose, categories,
special-category basis, export limits); if any fails, no consent is even looked
at. Otherwise each participant is permitted only when every rule allows it:
an answer for the requested purpose or a broader one (the nearest answer wins);
a status that permits processing (`given`/`renewed`), not expired at `now`;
every requested category granted, and for derived data also what it is derived
from (derived data inherits its recording's consent scope); explicit consent
where the purpose relies on GDPR Art. 9(2)(a) for special-category data or data
derived from it; enough budget (the caller's exact accountant decides that; see
`vault.services.budget.affordable`). A cohort request is then refused as a whole when
fewer than the purpose's minimum cohort remain.

Speed: the request-wide work is done once; each participant costs a few dict
lookups and one subset test (measured by `mindward bench`, target `decisions_per_s`).
"""

from __future__ import annotations

import datetime as dt
import math
from array import array
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from enum import StrEnum
from fractions import Fraction
from types import MappingProxyType
from typing import Annotated, Any, Literal

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, StringConstraints, ValidationError

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


def exact_amount(value: Any) -> Any:
    """Floats by their shortest decimal form (0.1 is exactly 1/10), as the privacy accountant
    and the policy's budgets read them; Fractions, ints and "a/b" strings exactly."""
    if isinstance(value, bool):
        raise ValueError("must be a number")
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError("must be finite")
        return Fraction(str(value))
    return value


Epsilon = Annotated[Fraction, BeforeValidator(exact_amount), Field(gt=0)]


class Request(BaseModel):
    """What someone asks for. `cohort` requests (exports, aggregates) enforce the
    purpose's minimum cohort; `export` requests enforce its noise and recipient rules;
    `epsilon` is the budget the release would spend per participant, exact (a Fraction)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    actor: Text
    role: Text
    purpose: Text
    categories: frozenset[Text] = Field(min_length=1)
    participants: tuple[str, ...] | None = None  # None: every participant given to decide()
    cohort: bool = True
    export: bool = False
    epsilon: Epsilon | None = None
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
    """Per participant: permitted, or the reasons for refusal. Equal and hashed by value; the
    hash is computed once (decisions are counted by value for every participant)."""

    permit: bool
    reasons: tuple[Reason, ...]
    _hash: int = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_hash", hash((self.permit, self.reasons)))

    def __hash__(self) -> int:
        return self._hash

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

    def summary(self, *, show_ids: bool) -> dict[str, Any]:
        """The decision as a document: counts always, per-participant reasons only with
        `show_ids` (stewards)."""
        doc: dict[str, Any] = {
            "permit": self.permit, "purpose": self.request.purpose,
            "categories": sorted(self.request.categories),
            "policy_version": self.policy_version, "eligible": len(self.eligible),
            "included": len(self.included),
            "cohort_reasons": [r.value for r in self.cohort_reasons],
            "refused_by_reason": dict(sorted(self.counts.items())),
            "message": self.refusal_message(),
        }
        if show_ids:
            doc["participants"] = {pid: d.explain() for pid, d in self.decisions.items()}
        return doc

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
            and request.epsilon > exact_amount(purpose.epsilon_per_release)):
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
           affordable: Mapping[str, bool] | None = None) -> CohortDecision:
    """Decide `request` for every participant it names (or every key of `consents`).

    `consents` maps participant id -> current consent version (None: enrolled but
    no consent on record). A participant the request names but `consents` lacks is
    'unknown-participant'. When the request spends `epsilon`, `affordable` must give
    the exact accountant's verdict per participant: True when the release fits every
    privacy budget of the purpose's chain (`vault.services.budget.affordable`); a
    participant it omits cannot afford it.
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
    if epsilon is not None and affordable is None:
        raise UsageError("a release that spends epsilon needs the accountant's verdict per participant")
    purpose = policy.purposes[request.purpose]
    decisions, eligible, numbers, budget_only = _decide_each(policy, request, consents, pids,
                                                             now, affordable)
    base["consent_digest"] = consent_digest(pids, numbers)
    counts: dict[str, int] = {}
    for d, n in Counter(decisions.values()).items():
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
                 now: dt.datetime, affordable: Mapping[str, bool] | None,
                 ) -> tuple[dict[str, Decision], list[str], list[int], int]:
    purpose = policy.purposes[request.purpose]
    chain = policy.chain(request.purpose)
    wanted = policy.consent_scope(request.categories)  # derived data needs its source too
    need_explicit = (purpose.special_category_basis == ART9_EXPLICIT_CONSENT
                     and not wanted.isdisjoint(policy.special_categories()))
    fits = (affordable if affordable is not None else {}).get
    spends = request.epsilon is not None
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
                and (not spends or fits(pid, False))):
            decisions[pid] = PERMIT
            eligible.append(pid)
            continue
        reasons: tuple[Reason, ...] = ()
        if not wanted <= entry.categories:
            reasons += (cat,)
        if need_explicit and not entry.explicit:
            reasons += (special,)
        if spends and not fits(pid, False):
            reasons += (spent,)
        d = _refusal(reasons)
        decisions[pid] = d
        if d is only_budget:
            budget_only += 1
    return decisions, eligible, numbers, budget_only
