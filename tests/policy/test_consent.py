"""Consent forms, consent versions and their history, and what they decide.

Outside sources: W3C DPV 2.1 consent statuses (w3c/dpv 2.1/dpv/modules/consent_status.ttl:
only ConsentGiven and RenewedConsentGiven are narrower than ConsentStatusValidForProcessing);
GDPR Art. 9(2)(a)/(j). The example forms are the ones docs/examples/README.md walks through;
the expected decisions below are the table in that README.
"""

from __future__ import annotations

import copy
import datetime as dt
import json
import tomllib
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.policy.test_policy import JUNK, NOW, _paths, random_policy, to_toml
from vault import crypto
from vault.errors import Conflict, IntegrityError, InvalidInput, UsageError
from vault.policy.consent import (
    DPV_STATUS_TERMS,
    PERMITTING,
    ConsentStatus,
    ConsentTerms,
    ConsentVersion,
    IdentityRecord,
    check_terms,
    parse_consent_form,
    record_consent,
    revise_status,
    split_identity,
    verify_history,
)
from vault.policy.decide import Reason, Request, decide
from vault.policy.policyset import PolicySet, load_default_policy

EXAMPLES = Path(__file__).resolve().parents[2] / "docs" / "examples"
FORMS = {
    "TL-001": "consent-all-granted.toml",
    "TL-002": "consent-no-recommender.toml",
    "TL-003": "consent-no-external.toml",
    "TL-004": "consent-expired.toml",
}
PARTNER = "Westbrook Institute of Food Design"
ENTERED = dt.datetime(2026, 5, 1, 9, 0, tzinfo=dt.UTC)  # before the expired form lapsed: it can be entered
# Identity values planted in forms: no error message may ever contain them.
SECRETS = {"code": "TL-987", "name": "Quorvina Secretname",
           "email": "quorvina.secret@mail.northfield.example", "phone": "+44 7700 900987"}


def pid(i: int) -> str:
    return f"{i:032x}"


def form_tables(name: str = "consent-all-granted.toml") -> dict[str, Any]:
    return tomllib.loads((EXAMPLES / name).read_text("utf-8"))


def enrol_example(policy: PolicySet, code: str, i: int,
                  at: dt.datetime = NOW) -> tuple[IdentityRecord, ConsentVersion]:
    form = parse_consent_form((EXAMPLES / FORMS[code]).read_bytes(), policy, now=at)
    identity, terms = split_identity(form)
    return identity, record_consent(terms, policy, participant_id=pid(i), recorded_at=at)


def request(purpose: str, categories: set[str], role: str = "steward", **kw: Any) -> Request:
    if purpose == "external-sharing":
        kw.setdefault("recipient", PARTNER)
    return Request(actor="t", role=role, purpose=purpose, categories=frozenset(categories),
                   cohort=False, **kw)


# --------------------------------------------------------------------------- statuses


def test_only_given_and_renewed_permit_processing_as_in_dpv() -> None:
    assert {ConsentStatus.GIVEN, ConsentStatus.RENEWED} == PERMITTING
    assert DPV_STATUS_TERMS[ConsentStatus.RENEWED] == "dpv:RenewedConsentGiven"
    assert DPV_STATUS_TERMS[ConsentStatus.WITHDRAWN] == "dpv:ConsentWithdrawn"
    assert set(DPV_STATUS_TERMS) == set(ConsentStatus)
    assert all(term.startswith("dpv:Consent") or term == "dpv:RenewedConsentGiven"
               for term in DPV_STATUS_TERMS.values())


# --------------------------------------------------------------------------- the examples

# The table of docs/examples/README.md: (purpose, categories) -> reasons per participant code
# at the demo's reference date 2026-06-15 ("" = permitted).
EXPECTED = {
    ("primary-analysis", "eeg-raw"): ("", "", "", "consent-expired"),
    ("recommender-training", "scores-derived"): ("", "consent-refused", "", "consent-expired"),
    ("recommender-training/canteen-menu", "ratings-explicit"):
        ("", "consent-refused", "", "consent-expired"),
    ("method-development", "eeg-raw"): ("", "", "", "consent-expired"),
    ("external-sharing", "scores-derived"): ("", "", "consent-refused", "consent-expired"),
    ("re-contact", "identity-contact"): ("", "consent-refused", "", "consent-expired"),
}


def test_example_forms_decide_as_documented() -> None:
    policy = load_default_policy()
    consents = {code: enrol_example(policy, code, i, ENTERED)[1] for i, code in enumerate(FORMS)}
    by_pid = {v.participant_id: v for v in consents.values()}
    for (purpose, category), expected in EXPECTED.items():
        d = decide(policy, request(purpose, {category}), by_pid, now=NOW)
        got = tuple(",".join(r.value for r in d.decisions[v.participant_id].reasons)
                    for v in consents.values())
        assert got == expected, (purpose, category)
    # four people are fewer than recommender training's minimum cohort of 20
    export = Request(actor="t", role="analyst", purpose="recommender-training", export=True,
                     categories=frozenset({"scores-derived"}), epsilon=0.5)
    d = decide(policy, export, by_pid, now=NOW, affordable=dict.fromkeys(by_pid, True))
    assert not d.permit and d.cohort_reasons == (Reason.COHORT_TOO_SMALL,)
    assert len(d.eligible) == 2 and d.included == ()
    # before 2026-06-01 the expired form still permitted everything it grants
    early = dt.datetime(2026, 5, 1, tzinfo=dt.UTC)
    d = decide(policy, request("primary-analysis", {"eeg-raw"}), by_pid, now=early)
    assert d.decisions[consents["TL-004"].participant_id].permit


def test_example_amendment_is_a_partial_withdrawal() -> None:
    policy = load_default_policy()
    _, v1 = enrol_example(policy, "TL-001", 1)
    later = NOW + dt.timedelta(days=1)
    form = parse_consent_form((EXAMPLES / "amend-withdraw-recommender.toml").read_bytes(),
                              policy, now=later)
    _, terms = split_identity(form)
    v2 = record_consent(terms, policy, participant_id=v1.participant_id, recorded_at=later,
                        previous=v1)
    verify_history([v1, v2])
    assert v2.number == 2 and v2.previous_digest == v1.digest and v2.change == "amended"
    assert v2.purposes["recommender-training"].status is ConsentStatus.WITHDRAWN
    assert v2.purposes["primary-analysis"].status is ConsentStatus.RENEWED
    d = decide(policy, request("recommender-training", {"scores-derived"}),
               {v2.participant_id: v2}, now=later)
    assert d.decisions[v2.participant_id].reasons == (Reason.CONSENT_WITHDRAWN,)
    # DPV's consent status terms (w3id.org/dpv; from memory of the DPV 2.0 vocabulary)
    assert v2.status_at("recommender-training", later).dpv == "dpv:ConsentWithdrawn"
    assert v1.status_at("recommender-training", later).dpv == "dpv:ConsentGiven"
    assert b"Ashcombe" not in v2.to_json() and b"northfield" not in v2.to_json()


def test_identity_is_split_off_and_never_in_the_terms() -> None:
    policy = load_default_policy()
    form = parse_consent_form((EXAMPLES / FORMS["TL-001"]).read_bytes(), policy, now=NOW)
    identity, terms = split_identity(form)
    _, version = enrol_example(policy, "TL-001", 0)
    assert identity.code == "TL-001" and identity.email is not None
    for blob in (terms.model_dump_json().encode(), version.to_json(),
                 repr(form).encode(), repr(identity).encode(), str(identity).encode()):
        for value in ("TL-001", "Maren", "Ashcombe", "900001", "mail.northfield"):
            assert value.encode() not in blob
    assert IdentityRecord.from_bytes(identity.to_bytes()) == identity
    with pytest.raises(IntegrityError):
        IdentityRecord.from_bytes(b'{"code": 5}')


# --------------------------------------------------------------------------- malformed forms

BAD_FORMS = [
    ("purposes|recommender-training|granted", ["eeg-raw", "eeg-rwa"],
     "consent form: purposes.recommender-training.granted[1]: unknown category 'eeg-rwa'"),
    ("purposes|selling", {"granted": ["ratings-explicit"]},
     "consent form: purposes.selling: unknown purpose 'selling'"),
    ("signed", None, "consent form: signed: required field is missing"),
    ("signed", "2026-03-02", "consent form: signed: Input should be a valid date"),
    ("signed", dt.date(2026, 7, 1), "consent form: signed: the signature date lies in the future"),
    ("expires", dt.date(2026, 3, 1),
     "consent form: expires: must be after the signature date (signed)"),
    ("expires", dt.date(2026, 3, 2),
     "consent form: expires: must be after the signature date (signed)"),
    ("retention_end", dt.date(2030, 1, 1), "consent form: retention_end: must not be before"),
    ("form_version", "NSL-2025-OLD/3", "consent form: form_version: unknown form version"),
    ("purposes|re-contact|refused", ["identity-contact"],
     "consent form: purposes.re-contact.refused[0]: category 'identity-contact' is also granted"),
    ("purposes|re-contact|granted", ["identity-contact", "identity-contact"],
     "consent form: purposes.re-contact.granted[1]: category 'identity-contact' is listed twice"),
    ("purposes|recommender-training|granted", ["scores-derived", "ratings-explicit"],
     "consent form: purposes.recommender-training.granted[0]: 'scores-derived' is derived from "
     "'eeg-raw', which this purpose does not grant"),
    ("purposes|primary-analysis|explicit", None,
     "consent form: purposes.primary-analysis.explicit: required: 'eeg-raw' is special-category"),
    ("purposes|primary-analysis|explicit", "yes",
     "consent form: purposes.primary-analysis.explicit: Input should be a valid boolean"),
    ("purposes|re-contact|explicit", True, None),  # granted, so allowed: no error
    ("permissions|external_sharing", False,
     "consent form: permissions.external_sharing: says false but purposes.external-sharing "
     "grants categories"),
    ("permissions|recontact", "maybe", "consent form: permissions.recontact: Input should be"),
    ("participant|email", "not an address", "consent form: participant.email: String should"),
    ("participant|phone", "call me", "consent form: participant.phone: String should"),
    ("participant|birthday", dt.date(1990, 1, 1),
     "consent form: participant.birthday: unknown field"),
    ("participant|code", None, "consent form: participant.code: required field is missing"),
    ("participant", None, "consent form: participant: required field is missing"),
    ("purposes", {}, "consent form: purposes: Dictionary should have at least 1 item"),
    ("witness", "J. Okafor", "consent form: witness: unknown field"),
]


def _plant_secrets(tables: dict[str, Any]) -> dict[str, Any]:
    tables["participant"].update(SECRETS)
    return tables


def _assert_clean(message: str) -> None:
    assert "\n" not in message and message.startswith("consent form: ")
    for value in (*SECRETS.values(), "Secretname", "quorvina", "900987"):
        assert value not in message


@pytest.mark.parametrize(("path", "value", "message"), BAD_FORMS)
def test_malformed_forms_are_refused_naming_the_field(path: str, value: Any,
                                                      message: str | None) -> None:
    policy = load_default_policy()
    tables = _plant_secrets(form_tables())
    node = tables
    keys = path.split("|")
    for k in keys[:-1]:
        node = node[k]
    if value is None:
        node.pop(keys[-1])
    else:
        node[keys[-1]] = value
    raw = to_toml(tables).encode()
    if message is None:
        parse_consent_form(raw, policy, now=NOW)
        return
    with pytest.raises(InvalidInput) as info:
        parse_consent_form(raw, policy, now=NOW)
    assert info.value.message.startswith(message), info.value.message
    _assert_clean(info.value.message)


def test_a_form_dated_today_in_the_latest_time_zone_is_not_in_the_future() -> None:
    policy = load_default_policy()
    tables = form_tables()
    tables["signed"] = NOW.date() + dt.timedelta(days=1)  # already the 16th at UTC+14
    parse_consent_form(to_toml(tables).encode(), policy, now=NOW)
    tables["signed"] = NOW.date() + dt.timedelta(days=2)
    with pytest.raises(InvalidInput, match="signed: the signature date lies in the future"):
        parse_consent_form(to_toml(tables).encode(), policy, now=NOW)


def test_an_email_refusal_does_not_echo_the_address() -> None:
    policy = load_default_policy()
    tables = _plant_secrets(form_tables())
    tables["participant"]["email"] = "quorvina.secret@@mail.northfield.example"
    with pytest.raises(InvalidInput) as info:
        parse_consent_form(to_toml(tables).encode(), policy, now=NOW)
    _assert_clean(info.value.message)


@settings(max_examples=200, deadline=None)
@given(data=st.data(), junk=JUNK, delete=st.booleans())
def test_fuzzed_forms_give_success_or_one_clean_line(data: st.DataObject, junk: Any,
                                                     delete: bool) -> None:
    policy = load_default_policy()
    tables = _plant_secrets(form_tables(data.draw(st.sampled_from(sorted(FORMS.values())))))
    path = data.draw(st.sampled_from(list(_paths(tables))))
    node = tables
    for k in path[:-1]:
        node = node[k]
    if delete:
        del node[path[-1]]
    else:
        node[path[-1]] = copy.deepcopy(junk)
    try:
        raw = to_toml(tables).encode()
    except TypeError:  # junk TOML cannot express (None)
        return
    try:
        form = parse_consent_form(raw, policy, now=NOW)
    except InvalidInput as exc:
        _assert_clean(exc.message)
        return
    identity, terms = split_identity(form)
    assert SECRETS["name"].encode() not in terms.model_dump_json().encode()
    assert identity.code


@settings(max_examples=100, deadline=None)
@given(raw=st.binary(max_size=400))
def test_fuzzed_form_bytes_give_success_or_invalid_input(raw: bytes) -> None:
    with pytest.raises(InvalidInput):
        parse_consent_form(raw, load_default_policy(), now=NOW)


# --------------------------------------------------------------------------- versions


def test_version_round_trip_digest_and_tamper_checks() -> None:
    policy = load_default_policy()
    _, v1 = enrol_example(policy, "TL-002", 1)
    assert v1.number == 1 and v1.previous_digest is None and v1.change == "enrolled"
    assert v1.policy_version == policy.version
    assert v1.purposes["recommender-training"].status is ConsentStatus.REFUSED
    assert v1.purposes["primary-analysis"].explicit
    again = ConsentVersion.from_json(v1.to_json())
    assert again == v1 and again.digest == v1.digest and again.to_json() == v1.to_json()
    # a stored version's digest is over the stored bytes, however they were laid out
    pretty = json.dumps(json.loads(v1.to_json()), indent=2).encode()
    assert ConsentVersion.from_json(pretty) == v1
    assert ConsentVersion.from_json(pretty).digest == crypto.sha256_hex(
        b"mindward/v1/consent-version\n" + pretty)
    for raw in (b"", b"{}", v1.to_json().replace(b'"number":1', b'"number":2'),
                v1.to_json().replace(b'"given"', b'"agreed"')):
        with pytest.raises(IntegrityError):
            ConsentVersion.from_json(raw)


def test_history_chain_detects_edits_reordering_and_mixing() -> None:
    policy = load_default_policy()
    _, v1 = enrol_example(policy, "TL-001", 1)
    v2 = revise_status(v1, ConsentStatus.WITHDRAWN, recorded_at=NOW,
                       purposes=["external-sharing"])
    v3 = revise_status(v2, ConsentStatus.REVOKED, recorded_at=NOW + dt.timedelta(hours=1))
    verify_history([v1, v2, v3])
    edited = v1.model_copy(update={"expires": dt.date(2040, 1, 1)})
    with pytest.raises(IntegrityError, match="version 2: does not chain"):
        verify_history([edited, v2, v3])
    with pytest.raises(IntegrityError, match="numbered"):
        verify_history([v1, v3, v2])
    _, other = enrol_example(policy, "TL-003", 3)
    with pytest.raises(IntegrityError):
        verify_history([other, v2])


def test_status_revisions() -> None:
    policy = load_default_policy()
    _, v1 = enrol_example(policy, "TL-002", 2)
    everything = revise_status(v1, ConsentStatus.WITHDRAWN, recorded_at=NOW)
    assert everything.change == "withdrawn" and everything.number == 2
    assert {e.status for e in everything.purposes.values()} == {
        ConsentStatus.WITHDRAWN, ConsentStatus.REFUSED}  # refusals stay refusals
    assert all(not e.categories for e in everything.purposes.values())
    for purpose, category in EXPECTED:
        d = decide(policy, request(purpose, {category}), {v1.participant_id: everything},
                   now=NOW)
        assert not d.decisions[v1.participant_id].permit
    with pytest.raises(Conflict):
        revise_status(everything, ConsentStatus.WITHDRAWN, recorded_at=NOW)
    with pytest.raises(UsageError):
        revise_status(v1, ConsentStatus.GIVEN, recorded_at=NOW)
    with pytest.raises(InvalidInput, match=r"purposes\.selling"):
        revise_status(v1, ConsentStatus.REVOKED, recorded_at=NOW, purposes=["selling"])
    revoked = revise_status(v1, ConsentStatus.INVALIDATED, recorded_at=NOW,
                            purposes=["recommender-training"])
    assert revoked.purposes["recommender-training"].status is ConsentStatus.INVALIDATED
    assert revoked.purposes["primary-analysis"].status is ConsentStatus.GIVEN


def test_amendment_rules() -> None:
    policy = load_default_policy()
    _, v1 = enrol_example(policy, "TL-001", 1)
    form = parse_consent_form((EXAMPLES / FORMS["TL-002"]).read_bytes(), policy, now=NOW)
    _, terms = split_identity(form)
    with pytest.raises(UsageError):
        record_consent(terms, policy, participant_id=pid(9), recorded_at=NOW, previous=v1)
    early = terms.model_copy(update={"signed": dt.date(2026, 3, 1)})
    with pytest.raises(InvalidInput, match="signed: before the signature of version 1"):
        record_consent(early, policy, participant_id=v1.participant_id, recorded_at=NOW,
                       previous=v1)
    partial = terms.model_copy(update={"purposes": {
        k: v for k, v in terms.purposes.items() if k != "method-development"}})
    with pytest.raises(InvalidInput, match=r"purposes\.method-development: answered in version 1"):
        record_consent(partial, policy, participant_id=v1.participant_id, recorded_at=NOW,
                       previous=v1)
    with pytest.raises(UsageError, match="time zone"):
        record_consent(terms, policy, participant_id=pid(1), recorded_at=dt.datetime(2026, 6, 1))


# --------------------------------------------------------------------------- properties


@st.composite
def random_terms(draw: st.DrawFn, policy: PolicySet, signed: dt.date,
                 answer: list[str] | None = None) -> ConsentTerms:
    """Valid terms for `policy`: closed under derivation, explicit where Art. 9(2)(a) needs it."""
    ids = answer if answer is not None else draw(
        st.lists(st.sampled_from(sorted(policy.purposes)), min_size=1, unique=True))
    cats = sorted(policy.categories)
    special = {c for c in cats if policy.categories[c].special_category}
    purposes: dict[str, Any] = {}
    for p in ids:
        granted = set(draw(st.lists(st.sampled_from(cats), unique=True)))
        for c in list(granted):
            src = policy.categories[c].derived_from
            while src is not None:
                granted.add(src)
                src = policy.categories[src].derived_from
        rest = [c for c in cats if c not in granted]
        refused = draw(st.lists(st.sampled_from(rest), unique=True)) if rest else []
        answer_p: dict[str, Any] = {"granted": sorted(granted), "refused": refused}
        if granted:
            needs = (policy.purposes[p].special_category_basis == "art9-2-a"
                     and granted & special)
            explicit = draw(st.booleans() if needs else st.none() | st.booleans())
            if explicit is not None:
                answer_p["explicit"] = explicit
        purposes[p] = answer_p
    terms = ConsentTerms.model_validate({
        "form_version": policy.meta.form_versions[0], "signed": signed,
        "expires": signed + dt.timedelta(days=draw(st.integers(100, 2000))),
        "purposes": purposes})
    check_terms(terms, policy, now=NOW)
    return terms


def _all_decisions(policy: PolicySet, consents: dict[str, ConsentVersion],
                   now: dt.datetime = NOW) -> dict[tuple[str, str], tuple[Reason, ...]]:
    out = {}
    for purpose_id, purpose in policy.purposes.items():
        for category in purpose.categories:
            r = Request(actor="t", role=purpose.roles[0], purpose=purpose_id,
                        categories=frozenset({category}), cohort=False,
                        recipient="R1" if purpose.requires_recipient else None)
            if purpose.recipients:
                r = r.model_copy(update={"recipient": purpose.recipients[0]})
            d = decide(policy, r, consents, now=now)
            for p, decision in d.decisions.items():
                out[(f"{purpose_id}|{category}", p)] = decision.reasons
    return out


def _normalised(decisions: dict[Any, tuple[Reason, ...]]) -> dict[Any, tuple[Reason, ...]]:
    # DPV tells a refusal from a withdrawal; both refuse, and which one depends on history.
    swap = {Reason.CONSENT_WITHDRAWN: Reason.CONSENT_REFUSED}
    return {k: tuple(swap.get(r, r) for r in v) for k, v in decisions.items()}


def _policies() -> st.SearchStrategy[PolicySet]:
    return st.just(load_default_policy()) | random_policy()


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_amending_then_reverting_restores_the_old_decisions(data: st.DataObject) -> None:
    policy = data.draw(_policies())
    s1 = dt.date(2026, 1, 1) + dt.timedelta(days=data.draw(st.integers(0, 60)))
    s2 = s1 + dt.timedelta(days=data.draw(st.integers(0, 30)))
    s3 = s2 + dt.timedelta(days=data.draw(st.integers(0, 30)))
    terms_a = data.draw(random_terms(policy, s1))
    terms_b = data.draw(random_terms(policy, s2, answer=sorted(terms_a.purposes)))
    who = pid(7)
    v1 = record_consent(terms_a, policy, participant_id=who, recorded_at=NOW)
    v2 = record_consent(terms_b, policy, participant_id=who, recorded_at=NOW, previous=v1)
    v3 = record_consent(terms_a.model_copy(update={"signed": s3}), policy, participant_id=who,
                        recorded_at=NOW, previous=v2)
    verify_history([v1, v2, v3])
    for now in (NOW, dt.datetime.combine(v1.expires, dt.time(), tzinfo=dt.UTC)):
        before = _all_decisions(policy, {who: v1}, now)
        after = _all_decisions(policy, {who: v3}, now)
        assert {k: v == () for k, v in after.items()} == {k: v == () for k, v in before.items()}
        assert _normalised(after) == _normalised(before)


Action = tuple[str, Any]


@st.composite
def action_sequences(draw: st.DrawFn, policy: PolicySet) -> list[Action]:
    steps: list[Action] = []
    for _ in range(draw(st.integers(1, 6))):
        kind = draw(st.sampled_from(["amend", "amend", "withdrawn", "revoked", "invalidated"]))
        if kind == "amend":
            steps.append((kind, draw(st.integers(0, 2**32))))
        else:
            steps.append((kind, draw(st.none() | st.lists(st.sampled_from(
                sorted(policy.purposes)), min_size=1, unique=True))))
    return steps


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_no_sequence_of_actions_permits_a_refused_category(data: st.DataObject) -> None:
    policy = data.draw(_policies())
    who = pid(3)
    signed = dt.date(2026, 1, 5)
    terms = data.draw(random_terms(policy, signed))
    current = record_consent(terms, policy, participant_id=who, recorded_at=NOW)
    history = [current]
    last_form = terms
    for kind, arg in data.draw(action_sequences(policy)):
        if kind == "amend":
            signed += dt.timedelta(days=1)
            answer = sorted(set(current.purposes) | set(data.draw(st.lists(
                st.sampled_from(sorted(policy.purposes)), unique=True))))
            last_form = data.draw(random_terms(policy, signed, answer=answer))
            current = record_consent(last_form, policy, participant_id=who, recorded_at=NOW,
                                     previous=current)
        else:
            try:
                current = revise_status(current, ConsentStatus(kind), recorded_at=NOW,
                                        purposes=arg)
            except (Conflict, InvalidInput):
                continue
        history.append(current)
        verify_history(history)
        decisions = _all_decisions(policy, {who: current})
        for (key, _), reasons in decisions.items():
            purpose_id, category = key.split("|")
            nearest = next((p for p in policy.chain(purpose_id) if p in current.purposes), None)
            form_answer = last_form.purposes.get(nearest) if nearest else None
            refused_now = (nearest is None or category not in current.purposes[nearest].categories
                           or current.purposes[nearest].status not in PERMITTING)
            if refused_now or (form_answer is not None and category in form_answer.refused):
                assert reasons != (), (kind, key)
