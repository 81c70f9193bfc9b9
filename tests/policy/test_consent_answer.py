"""The one rule of which consent answer speaks for a purpose (vault.policy.consent): the
narrowest answered purpose at or above the requested one. Checked against the decisions
documented in docs/examples/README.md (through `decide`) and on consents with answers removed."""

from __future__ import annotations

import datetime as dt

import pytest

from tests.policy.test_consent import ENTERED, FORMS, NOW, enrol_example, request
from vault.policy.consent import (
    ConsentStatus,
    answer_for,
    answering_purpose,
    covers_storage,
    permits_purpose,
    revise_status,
)
from vault.policy.decide import Reason, decide
from vault.policy.policyset import load_default_policy

POLICY = load_default_policy()
CHILD = "recommender-training/canteen-menu"
PARENT = "recommender-training"
CONSENT_REASONS = {Reason.NO_CONSENT_FOR_PURPOSE, Reason.CONSENT_REFUSED, Reason.CONSENT_WITHDRAWN,
                   Reason.CONSENT_REVOKED, Reason.CONSENT_INVALIDATED, Reason.CONSENT_EXPIRED}


def _versions():
    return [enrol_example(POLICY, code, i, ENTERED)[1] for i, code in enumerate(FORMS)]


@pytest.mark.parametrize("purpose", sorted(POLICY.purposes))
def test_the_rule_agrees_with_every_decision_on_the_examples(purpose: str) -> None:
    # a broken rule (the broadest answer, or the first answered purpose of the form) would
    # disagree with decide on the no-recommender and expired examples
    versions = _versions()
    category = sorted(POLICY.purposes[purpose].categories)[0]
    decision = decide(POLICY, request(purpose, {category}), {v.participant_id: v for v in versions},
                      now=NOW)
    for version in versions:
        refused_by_consent = bool(set(decision.decisions[version.participant_id].reasons)
                                  & CONSENT_REASONS)
        assert permits_purpose(version, POLICY.chain(purpose), NOW) is not refused_by_consent


def test_a_child_purpose_without_an_answer_of_its_own_is_answered_by_its_parent() -> None:
    version = _versions()[0]  # all granted: answers the parent, not the canteen-menu child
    assert CHILD not in version.purposes and POLICY.chain(CHILD)[1] == PARENT
    assert answering_purpose(version, POLICY.chain(CHILD)) == PARENT
    assert answer_for(version, POLICY.chain(CHILD)) == version.purposes[PARENT]
    assert permits_purpose(version, POLICY.chain(CHILD), NOW)
    nothing = version.model_copy(update={"purposes": {}})
    assert answering_purpose(nothing, POLICY.chain(CHILD)) is None
    assert answer_for(nothing, POLICY.chain(CHILD)) is None
    assert not permits_purpose(nothing, POLICY.chain(CHILD), NOW)
    assert not permits_purpose(None, POLICY.chain(CHILD), NOW)


def test_a_withdrawn_child_is_not_rescued_by_a_permitting_parent() -> None:
    version = _versions()[0]
    own = version.purposes[PARENT].model_copy(update={"status": ConsentStatus.WITHDRAWN})
    with_child = version.model_copy(update={"purposes": {**version.purposes, CHILD: own}})
    assert answering_purpose(with_child, POLICY.chain(CHILD)) == CHILD
    assert not permits_purpose(with_child, POLICY.chain(CHILD), NOW)
    assert permits_purpose(with_child, POLICY.chain(PARENT), NOW)
    withdrawn = revise_status(version, ConsentStatus.WITHDRAWN, recorded_at=NOW, purposes=[PARENT])
    assert not permits_purpose(withdrawn, POLICY.chain(CHILD), NOW)  # the parent's answer speaks


def test_expiry_ends_every_answer_and_storage_cover() -> None:
    version = _versions()[0]
    later = version.ends_at + dt.timedelta(seconds=1)
    assert permits_purpose(version, POLICY.chain(PARENT), NOW)
    assert not permits_purpose(version, POLICY.chain(PARENT), later)
    assert covers_storage(version, "eeg-raw", NOW) and not covers_storage(version, "eeg-raw", later)
    assert not covers_storage(version, "no-such-category", NOW) and not covers_storage(None, "eeg-raw", NOW)
