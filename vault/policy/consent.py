"""Consent forms in, consent versions out: parsing, validation and the append-only history.

Pure: no storage, no clock. A filled form (`ConsentForm`, our own TOML format,
see docs/examples/) is checked against the policy set, then split into the
participant's identity (`IdentityRecord`, which the vault encrypts under the
participant's own key) and the terms (`ConsentTerms`). Terms become
`ConsentVersion`s: numbered, each naming the digest of the one before,
never edited. Field names follow the consent record structure of ISO/IEC TS
27560 where it fits (see docs/examples/README.md).

Statuses are the W3C Data Privacy Vocabulary (DPV 2.1) consent-status terms;
only `given` and `renewed` permit processing. `expired` is never stored: it is
derived from the version's end date at decision time, so consent lapses on its
date without anyone acting.

Error messages name fields and policy ids, never the identity or contact values.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterable, Mapping, Sequence
from enum import StrEnum
from functools import cached_property
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    ValidationError,
    field_serializer,
    field_validator,
    model_validator,
)

from vault import crypto
from vault.errors import Conflict, IntegrityError, InvalidInput, UsageError
from vault.policy.policyset import (
    ART9_EXPLICIT_CONSENT,
    DpvTerm,
    Flag,
    Id,
    PolicySet,
    PurposeId,
    ShortText,
    canonical_json,
    invalid_from_validation,
    parse_toml,
    safe_id,
)

RECORD_SCHEMA = 1
DIGEST_DOMAIN = b"mindward/v1/consent-version\n"
FORM_SOURCE = "consent form"
# Plausible dates (docs/examples/README.md): nothing was signed before this tool's era,
# and no consent is meant to last longer than a lifetime.
EARLIEST_SIGNED = dt.date(2000, 1, 1)
LONGEST_TERM = dt.timedelta(days=36525)  # 100 years after today


class ConsentStatus(StrEnum):
    """W3C DPV consent statuses (https://w3id.org/dpv, module consent_status)."""

    GIVEN = "given"
    RENEWED = "renewed"
    REFUSED = "refused"
    WITHDRAWN = "withdrawn"
    REVOKED = "revoked"
    EXPIRED = "expired"
    INVALIDATED = "invalidated"

    @property
    def dpv(self) -> str:
        return DPV_STATUS_TERMS[self]


# Checked against w3c/dpv 2.1/dpv/modules/consent_status.ttl: GIVEN and RENEWED are
# narrower than dpv:ConsentStatusValidForProcessing, all others than ...InvalidForProcessing.
DPV_STATUS_TERMS: Mapping[ConsentStatus, str] = {
    ConsentStatus.GIVEN: "dpv:ConsentGiven",
    ConsentStatus.RENEWED: "dpv:RenewedConsentGiven",
    ConsentStatus.REFUSED: "dpv:ConsentRefused",
    ConsentStatus.WITHDRAWN: "dpv:ConsentWithdrawn",  # by the participant
    ConsentStatus.REVOKED: "dpv:ConsentRevoked",  # by someone else (the lab)
    ConsentStatus.EXPIRED: "dpv:ConsentExpired",
    ConsentStatus.INVALIDATED: "dpv:ConsentInvalidated",  # e.g. by an ethics board or court
}
PERMITTING: frozenset[ConsentStatus] = frozenset({ConsentStatus.GIVEN, ConsentStatus.RENEWED})

StrictDate = Annotated[dt.date, Field(strict=True)]
ParticipantId = Annotated[str, StringConstraints(pattern=r"^[0-9a-f]{32}$")]
Digest = Annotated[str, StringConstraints(pattern=r"^[0-9a-f]{64}$")]


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


# --------------------------------------------------------------------------- the form (input)


class IdentityRecord(_Model):
    """Who the participant is. Only ever stored encrypted under their own key."""

    code: Annotated[str, StringConstraints(pattern=r"^[A-Za-z0-9][A-Za-z0-9_./-]{0,31}$")]
    name: Annotated[str, StringConstraints(strip_whitespace=True, min_length=1,
                                           max_length=200)] | None = None
    email: Annotated[str, StringConstraints(pattern=r"^[^@\s]{1,64}@[^@\s]{1,190}$")] | None = None
    phone: Annotated[str, StringConstraints(pattern=r"^\+?[0-9][0-9 ().-]{2,31}$")] | None = None
    postal_address: Annotated[str, StringConstraints(strip_whitespace=True, min_length=1,
                                                     max_length=500)] | None = None

    def to_bytes(self) -> bytes:
        """Canonical JSON, the plaintext the vault encrypts."""
        return canonical_json(self)

    @classmethod
    def from_bytes(cls, raw: bytes) -> IdentityRecord:
        try:
            return cls.model_validate_json(raw)
        except ValidationError:
            raise IntegrityError("identity record is malformed") from None

    def __repr__(self) -> str:  # never print contact details by accident
        return "IdentityRecord(<redacted>)"

    __str__ = __repr__


class PurposeAnswer(_Model):
    """The participant's answer for one purpose: categories granted and refused."""

    granted: tuple[Id, ...] = ()
    refused: tuple[Id, ...] = ()
    explicit: Flag | None = None  # explicit consent for special-category data (Art. 9(2)(a))

    @property
    def grants_any(self) -> bool:
        return bool(self.granted)


class Permissions(_Model):
    """Optional yes/no boxes of the form; must agree with the purposes they gate."""

    recontact: Flag | None = None
    external_sharing: Flag | None = None


class ConsentTerms(_Model):
    """A form without the participant's identity: what the vault keeps in the clear."""

    form_version: ShortText
    signed: StrictDate
    expires: StrictDate
    retention_end: StrictDate | None = None
    permissions: Permissions = Permissions()
    purposes: dict[PurposeId, PurposeAnswer] = Field(min_length=1)


class ConsentForm(ConsentTerms):
    """A filled consent form as the lab writes it (TOML)."""

    participant: IdentityRecord

    def __repr__(self) -> str:
        return f"ConsentForm(form_version={self.form_version!r}, participant=<redacted>)"

    __str__ = __repr__


def split_identity(form: ConsentForm) -> tuple[IdentityRecord, ConsentTerms]:
    """Separate what identifies the participant from the terms of their consent."""
    terms = ConsentTerms.model_validate(form.model_dump(exclude={"participant"}))
    return form.participant, terms


def parse_consent_form(raw: bytes, policy: PolicySet, *, now: dt.datetime,
                       source: str = FORM_SOURCE) -> ConsentForm:
    """TOML bytes -> a form checked against `policy`, or one InvalidInput line.

    `source` appears in messages: do not build it from a file name that names a person.
    """
    data = parse_toml(source, raw)
    try:
        form = ConsentForm.model_validate(data)
    except ValidationError as exc:
        raise invalid_from_validation(source, exc) from None
    check_terms(form, policy, now=now, source=source)
    check_plausible(form, now=now, source=source)
    return form


def check_plausible(terms: ConsentTerms, *, now: dt.datetime, source: str = FORM_SOURCE) -> None:
    """Refuse a form's dates no real form has (docs/examples/README.md): signed before
    2000, running more than 100 years, or ended already when it is entered."""
    utc = _aware(now, "now").astimezone(dt.UTC).date()
    latest = utc + LONGEST_TERM
    if terms.signed < EARLIEST_SIGNED:
        raise InvalidInput(f"{source}: signed: lies before {EARLIEST_SIGNED.isoformat()}: "
                           "check the year")
    if terms.expires <= utc:
        raise InvalidInput(f"{source}: expires: this consent has ended already (it ends at the "
                           "start of that day, UTC); a form can only be entered while it runs")
    for name, day in (("expires", terms.expires), ("retention_end", terms.retention_end)):
        if day is not None and day > latest:
            raise InvalidInput(f"{source}: {name}: lies more than 100 years ahead: check the year")


_Fail = Callable[[str, str], InvalidInput]


def check_terms(terms: ConsentTerms, policy: PolicySet, *, now: dt.datetime,
                source: str = FORM_SOURCE) -> None:
    """Refuse anything ambiguous: unknown ids, impossible dates, contradictions."""
    # A form dated today anywhere on Earth is not in the future (UTC+14 is the latest zone).
    today = (_aware(now, "now").astimezone(dt.UTC) + dt.timedelta(hours=14)).date()

    def fail(path: str, message: str) -> InvalidInput:
        return InvalidInput(f"{source}: {path}: {message}")

    if terms.form_version not in policy.meta.form_versions:
        raise fail("form_version", f"unknown form version {safe_id(terms.form_version)} "
                   f"(the policy accepts: {', '.join(policy.meta.form_versions)})")
    if terms.signed > today:
        raise fail("signed", "the signature date lies in the future")
    if terms.expires <= terms.signed:
        raise fail("expires", "must be after the signature date (signed)")
    if terms.retention_end is not None and terms.retention_end < terms.expires:
        raise fail("retention_end", "must not be before expires")
    for pid, answer in terms.purposes.items():
        _check_answer(policy, pid, answer, fail)
    _check_permissions(policy, terms, fail)


def _check_answer(policy: PolicySet, pid: str, answer: PurposeAnswer, fail: _Fail) -> None:
    path = f"purposes.{pid}"
    if pid not in policy.purposes:
        raise fail(path, f"unknown purpose {safe_id(pid)}")
    for field in ("granted", "refused"):
        ids = getattr(answer, field)
        for i, cid in enumerate(ids):
            if cid not in policy.categories:
                raise fail(f"{path}.{field}[{i}]", f"unknown category {safe_id(cid)}")
            if cid in ids[:i]:
                raise fail(f"{path}.{field}[{i}]", f"category {safe_id(cid)} is listed twice")
    for i, cid in enumerate(answer.refused):
        if cid in answer.granted:
            raise fail(f"{path}.refused[{i}]", f"category {safe_id(cid)} is also granted")
    for i, cid in enumerate(answer.granted):
        source = policy.categories[cid].derived_from
        if source is not None and source not in answer.granted:
            raise fail(f"{path}.granted[{i}]",
                       f"{safe_id(cid)} is derived from {safe_id(source)}, which this purpose "
                       "does not grant (derived data inherits its recording's consent scope)")
    if answer.explicit is True and not answer.granted:
        raise fail(f"{path}.explicit", "explicit consent for a purpose that grants nothing")
    purpose = policy.purposes[pid]
    special = policy.special_categories().intersection(answer.granted)
    if (special and purpose.special_category_basis == ART9_EXPLICIT_CONSENT
            and answer.explicit is None):
        raise fail(f"{path}.explicit",
                   f"required: {safe_id(sorted(special)[0])} is special-category data and this "
                   "purpose relies on explicit consent (GDPR Art. 9(2)(a))")


def _check_permissions(policy: PolicySet, terms: ConsentTerms, fail: _Fail) -> None:
    for pid, purpose in policy.purposes.items():
        name = purpose.form_permission
        if name is None or purpose.parent is not None:
            continue
        box = getattr(terms.permissions, name)
        if box is None:
            continue
        answer = terms.purposes.get(pid)
        grants = answer is not None and answer.grants_any
        if box != grants:
            does = "grants categories" if grants else "grants nothing"
            raise fail(f"permissions.{name}",
                       f"says {str(box).lower()} but purposes.{pid} {does}")


# --------------------------------------------------------------------------- versions (stored)


class PurposeConsent(_Model):
    """One purpose in one consent version."""

    status: ConsentStatus
    categories: frozenset[Id] = frozenset()
    explicit: bool = False
    lawful_basis_dpv: DpvTerm  # as the policy declared it when this version was recorded
    special_category: bool = False
    special_category_basis: Literal["art9-2-a", "art9-2-j"] | None = None

    @field_serializer("categories")
    def _sorted(self, value: frozenset[str]) -> list[str]:
        return sorted(value)

    @property
    def permits(self) -> bool:
        return self.status in PERMITTING


Change = Literal["enrolled", "amended", "withdrawn", "revoked", "invalidated"]


class ConsentVersion(_Model):
    """One immutable version of a participant's consent (ISO/IEC TS 27560-style record)."""

    record_schema: Literal[1] = RECORD_SCHEMA
    participant_id: ParticipantId  # random, assigned by the vault; the only id used elsewhere
    number: Annotated[int, Field(strict=True, ge=1)]
    previous_digest: Digest | None
    change: Change
    recorded_at: dt.datetime
    policy_version: Annotated[str, StringConstraints(pattern=r"^[0-9a-f]{16}$")]
    form_version: ShortText
    signed: dt.date
    expires: dt.date
    retention_end: dt.date | None = None
    recontact: bool | None = None
    external_sharing: bool | None = None
    purposes: dict[PurposeId, PurposeConsent]

    @field_validator("recorded_at")
    @classmethod
    def _utc(cls, value: dt.datetime) -> dt.datetime:
        if value.tzinfo is None:
            raise ValueError("needs a time zone")
        return value.astimezone(dt.UTC)

    @model_validator(mode="after")
    def _chain_start(self) -> ConsentVersion:
        if (self.number == 1) != (self.previous_digest is None):
            raise ValueError("only version 1 has no previous version")
        return self

    @cached_property
    def ends_at(self) -> dt.datetime:
        """Start of the expiry day (UTC): from this instant the consent is expired.

        The earlier of `expires` and `retention_end`; cached (the decision loop reads it).
        """
        end = self.expires if self.retention_end is None else min(self.expires,
                                                                   self.retention_end)
        return dt.datetime.combine(end, dt.time(0, 0), tzinfo=dt.UTC)

    @cached_property
    def digest(self) -> str:
        """SHA-256 (hex) of the canonical JSON; the next version names it."""
        return crypto.sha256_hex(DIGEST_DOMAIN + self.to_json())

    def model_copy(self, *, update: Mapping[str, Any] | None = None,
                   deep: bool = False) -> ConsentVersion:
        """Copies are validated afresh, so the cached `ends_at` and `digest` are never stale."""
        data = self.model_dump()
        data.update(update or {})
        return type(self).model_validate(data)

    def to_json(self) -> bytes:
        return canonical_json(self)

    @classmethod
    def from_json(cls, raw: bytes) -> ConsentVersion:
        """Load a stored version; its digest is taken over the stored bytes themselves,
        so a later change in how JSON is written cannot break the chain."""
        try:
            version = cls.model_validate_json(raw)
        except ValidationError:
            raise IntegrityError("stored consent version is malformed") from None
        version.__dict__["digest"] = crypto.sha256_hex(DIGEST_DOMAIN + bytes(raw))
        return version

    def is_expired(self, now: dt.datetime) -> bool:
        return self.ends_at <= now

    def status_at(self, purpose: str, now: dt.datetime) -> ConsentStatus | None:
        """The DPV status of `purpose` at `now` (None when the form did not answer it)."""
        entry = self.purposes.get(purpose)
        if entry is None:
            return None
        if entry.status in PERMITTING and self.ends_at <= now:
            return ConsentStatus.EXPIRED
        return entry.status


# -- which answer speaks for a purpose: the one rule, used by decisions, exports, withdrawal,
# the report and ingest

def answering_purpose(consent: ConsentVersion, chain: Iterable[str]) -> str | None:
    """The purpose whose answer decides: the narrowest one at or above the requested purpose
    that the version answers (`chain`: the purpose, then its parents, as `PolicySet.chain`)."""
    answers = consent.purposes
    for purpose in chain:
        if purpose in answers:
            return purpose
    return None


def answer_for(consent: ConsentVersion, chain: Iterable[str]) -> PurposeConsent | None:
    """The answer that decides for the purpose `chain` starts with (None: not answered)."""
    purpose = answering_purpose(consent, chain)
    return None if purpose is None else consent.purposes[purpose]


def permits_purpose(consent: ConsentVersion | None, chain: Iterable[str], now: dt.datetime) -> bool:
    """A live yes: the deciding answer permits processing and the version has not expired."""
    if consent is None or consent.is_expired(now):
        return False
    answer = answer_for(consent, chain)
    return answer is not None and answer.permits


def covers_storage(consent: ConsentVersion | None, category: str, now: dt.datetime) -> bool:
    """Storing `category` needs some purpose granting it with a status that permits
    processing, in a version that has not expired."""
    if consent is None or consent.is_expired(now):
        return False
    return any(p.permits and category in p.categories for p in consent.purposes.values())


def _aware(moment: dt.datetime, name: str) -> dt.datetime:
    if not isinstance(moment, dt.datetime) or moment.tzinfo is None:
        raise UsageError(f"{name} must be a datetime with a time zone")
    return moment


def _purpose_consent(policy: PolicySet, pid: str, status: ConsentStatus,
                     answer: PurposeAnswer | None) -> PurposeConsent:
    purpose = policy.purposes[pid]
    return PurposeConsent(
        status=status,
        categories=frozenset(answer.granted) if answer and status in PERMITTING else frozenset(),
        explicit=bool(answer and answer.explicit and status in PERMITTING),
        lawful_basis_dpv=purpose.lawful_basis_dpv,
        special_category=purpose.special_category,
        special_category_basis=purpose.special_category_basis,
    )


def _amended_status(before: ConsentStatus | None, grants: bool) -> ConsentStatus:
    if grants:
        return ConsentStatus.RENEWED if before in PERMITTING else ConsentStatus.GIVEN
    if before in PERMITTING or before is ConsentStatus.WITHDRAWN:
        return ConsentStatus.WITHDRAWN
    return ConsentStatus.REFUSED


def record_consent(terms: ConsentTerms, policy: PolicySet, *, participant_id: str,
                   recorded_at: dt.datetime, previous: ConsentVersion | None = None,
                   source: str = FORM_SOURCE) -> ConsentVersion:
    """Version 1 (enrolment) or the next version (amendment) from checked terms.

    An amendment restates the whole form: a purpose answered before must be
    answered again; one granted before and refused now becomes `withdrawn`
    (a partial withdrawal), one granted again becomes `renewed`.
    """
    _aware(recorded_at, "recorded_at")
    check_terms(terms, policy, now=recorded_at, source=source)
    statuses: dict[str, ConsentStatus] = {}
    if previous is None:
        for pid, answer in terms.purposes.items():
            statuses[pid] = ConsentStatus.GIVEN if answer.grants_any else ConsentStatus.REFUSED
    else:
        if previous.participant_id != participant_id:
            raise UsageError("an amendment must name the participant of the previous version")
        if terms.signed < previous.signed:
            raise InvalidInput(f"{source}: signed: before the signature of version "
                               f"{previous.number}")
        for pid in previous.purposes:
            if pid not in terms.purposes and pid in policy.purposes:
                raise InvalidInput(f"{source}: purposes.{pid}: answered in version "
                                   f"{previous.number} but missing here; say granted or refused")
        for pid, answer in terms.purposes.items():
            before = previous.purposes.get(pid)
            statuses[pid] = _amended_status(before.status if before else None, answer.grants_any)
    purposes = {pid: _purpose_consent(policy, pid, status, terms.purposes[pid])
                for pid, status in sorted(statuses.items())}
    return _build(
        participant_id=participant_id,
        number=1 if previous is None else previous.number + 1,
        previous_digest=None if previous is None else previous.digest,
        change="enrolled" if previous is None else "amended",
        recorded_at=recorded_at,
        policy_version=policy.version,
        form_version=terms.form_version,
        signed=terms.signed,
        expires=terms.expires,
        retention_end=terms.retention_end,
        recontact=terms.permissions.recontact,
        external_sharing=terms.permissions.external_sharing,
        purposes=purposes,
    )


def _build(**fields: object) -> ConsentVersion:
    try:
        return ConsentVersion(**fields)  # type: ignore[arg-type]
    except ValidationError as exc:
        raise invalid_from_validation("consent version", exc) from None


_REVISIONS: Mapping[ConsentStatus, Change] = {
    ConsentStatus.WITHDRAWN: "withdrawn",
    ConsentStatus.REVOKED: "revoked",
    ConsentStatus.INVALIDATED: "invalidated",
}


def revise_status(previous: ConsentVersion, status: ConsentStatus, *, recorded_at: dt.datetime,
                  purposes: Iterable[str] | None = None) -> ConsentVersion:
    """A new version ending consent for some or all purposes.

    `withdrawn`: by the participant (only purposes whose consent is given or
    renewed change). `revoked`: by the lab. `invalidated`: consent found invalid
    (e.g. by the ethics board). Granting again needs a new signed form.
    """
    _aware(recorded_at, "recorded_at")
    if status not in _REVISIONS:
        raise UsageError("a status revision is 'withdrawn', 'revoked' or 'invalidated'; "
                         "to grant consent, amend with a signed form")
    named = list(previous.purposes) if purposes is None else list(dict.fromkeys(purposes))
    for pid in named:
        if pid not in previous.purposes:
            raise InvalidInput(f"consent: purposes.{pid}: not answered in version "
                               f"{previous.number}")
    changed = dict(previous.purposes)
    for pid in named:
        entry = previous.purposes[pid]
        if entry.status == status:
            continue
        if status is ConsentStatus.WITHDRAWN and entry.status not in PERMITTING:
            continue
        changed[pid] = entry.model_copy(update={"status": status, "categories": frozenset(),
                                                "explicit": False})
    if changed == dict(previous.purposes):
        raise Conflict(f"consent: nothing to change: no named purpose can become '{status}'")
    data = previous.model_dump(exclude={"purposes"})
    data.update(number=previous.number + 1, previous_digest=previous.digest,
                change=_REVISIONS[status], recorded_at=recorded_at, purposes=changed)
    return _build(**data)


def verify_history(versions: Sequence[ConsentVersion]) -> None:
    """Check numbering, the digest chain, the participant id and time order."""
    for i, version in enumerate(versions):
        where = f"consent history: version {i + 1}"
        if version.number != i + 1:
            raise IntegrityError(f"{where}: numbered {version.number}")
        if i == 0:
            continue
        before = versions[i - 1]
        if version.previous_digest != before.digest:
            raise IntegrityError(f"{where}: does not chain to version {i}")
        if version.participant_id != before.participant_id:
            raise IntegrityError(f"{where}: belongs to another participant")
        if version.recorded_at < before.recorded_at:
            raise IntegrityError(f"{where}: recorded before version {i}")
