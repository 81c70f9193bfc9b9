"""Served vaults: conversion, token members, authentication (library level; the server's own
tests drive the same calls over HTTP). Each test tries a way to cheat and checks it fails."""

from __future__ import annotations

import datetime as dt
import shutil
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.clock import ManualClock
from tests.conftest import TEST_PASSPHRASE
from vault import (
    AuthenticationFailed,
    Conflict,
    NotFound,
    PolicyRefusal,
    Throttled,
    UsageError,
    Vault,
    describe,
)
from vault.storage import db as storage

NEW_PASSPHRASE = "a different passphrase for the service"
T0 = dt.datetime(2026, 6, 1, 9, 0, tzinfo=dt.UTC)


@pytest.fixture
def clock() -> ManualClock:
    return ManualClock(T0)


@pytest.fixture
def served(vault_path: Path, clock: ManualClock):
    """A vault with an analyst and an auditor (passphrase slots), then converted."""
    v = Vault.init(vault_path, TEST_PASSPHRASE, clock=clock)
    v.add_member("ana", "analyst", "analyst passphrase 1")
    v.add_member("aud", "auditor", "auditor passphrase 1")
    result = v.make_served(NEW_PASSPHRASE)
    assert result["slots_dropped"] == ["ana", "aud"]
    yield v
    v.close()


def _entries(v: Vault, action: str) -> list[dict]:
    return [e for e in v.audit_entries() if e["action"] == action]


def test_conversion_removes_every_other_key_slot_and_info_says_whose(served: Vault, vault_path: Path) -> None:
    facts = describe(vault_path)
    assert facts["served"] is True
    assert facts["key_slots"] == [{"member": "steward", "role": "steward"}]
    assert _entries(served, "vault.serve-setup")[0]["details"]["slots_dropped"] == ["ana", "aud"]
    with pytest.raises(Conflict):
        served.make_served(NEW_PASSPHRASE)
    served.close()
    for name, old in (("ana", "analyst passphrase 1"), ("aud", "auditor passphrase 1")):
        with pytest.raises(AuthenticationFailed):
            Vault.open(vault_path, old, member=name)


def test_conversion_rekeys_so_the_old_steward_passphrase_no_longer_opens(served: Vault,
                                                                          vault_path: Path) -> None:
    served.close()
    with pytest.raises(AuthenticationFailed):
        Vault.open(vault_path, TEST_PASSPHRASE)
    Vault.open(vault_path, NEW_PASSPHRASE).close()


def test_analysts_and_auditors_on_a_served_vault_get_tokens_never_slots(served: Vault,
                                                                          vault_path: Path) -> None:
    with pytest.raises(UsageError):
        served.add_member("bob", "analyst", "bob's passphrase 123")
    minted = served.add_member("bob", "analyst")
    assert minted["token"].startswith("mwt1-") and minted["role"] == "analyst"
    assert describe(vault_path)["key_slots"] == [{"member": "steward", "role": "steward"}]
    assert describe(vault_path)["token_members"] == 1
    rows = {r["member"]: r for r in served.members()}
    assert rows["bob"]["key_slot"] is False and rows["bob"]["tokens"] == 1
    assert rows["steward"]["key_slot"] is True
    with pytest.raises(Conflict):
        served.add_member("bob", "auditor")


def test_the_token_is_not_stored_and_the_database_holds_no_secret(served: Vault, vault_path: Path) -> None:
    minted = served.add_member("bob", "analyst")
    secret = minted["token"].split("-")[2]
    served.close()
    for path in vault_path.rglob("*"):
        if path.is_file():
            data = path.read_bytes()
            assert secret.encode() not in data and bytes.fromhex(secret) not in data, path


def test_a_token_authenticates_as_its_member_and_every_use_is_audited(served: Vault) -> None:
    token = served.add_member("bob", "analyst")["token"]
    view = served.authenticate(token, client="127.0.0.1", operation="access.check")
    assert (view.member, view.role) == ("bob", "analyst")
    assert (served.member, served.role) == ("steward", "steward")  # the service is unchanged
    use = _entries(served, "auth.token")[-1]
    assert use["actor"] == "bob" and use["decision"] == "permit"
    assert use["details"]["role"] == "analyst" and use["details"]["operation"] == "access.check"
    assert token not in str(served.audit_entries())
    view.close()  # a view's close leaves the service open
    served.members()


def test_a_view_is_held_to_its_role_by_the_library(served: Vault) -> None:
    view = served.authenticate(served.add_member("bob", "analyst")["token"], client="c",
                               operation="member.add")
    with pytest.raises(PolicyRefusal):
        view.add_member("eve", "steward")
    with pytest.raises(PolicyRefusal):
        view.issue_token("bob")
    with pytest.raises(PolicyRefusal):
        view.make_served(NEW_PASSPHRASE)
    refusal = _entries(served, "member.add")[-1]
    assert refusal["actor"] == "bob" and refusal["decision"] == "refuse"


def test_a_view_authenticating_again_cannot_escalate(served: Vault) -> None:
    ana = served.authenticate(served.add_member("ana", "analyst")["token"], client="c", operation="x")
    aud_token = served.add_member("aud", "auditor")["token"]
    again = ana.authenticate(aud_token, client="c", operation="x")
    assert (again.member, again.role) == ("aud", "auditor")
    with pytest.raises(AuthenticationFailed):
        ana.authenticate("mwt1-" + "0" * 16 + "-" + "0" * 64, client="c", operation="x")


@pytest.mark.parametrize("how", ["missing", "malformed", "forged", "unknown", "expired",
                                 "revoked", "removed", "role-edited", "expiry-edited"])
def test_every_bad_token_fails_alike_and_the_reason_is_audited(served: Vault, clock: ManualClock,
                                                                how: str) -> None:
    minted = served.add_member("bob", "analyst", expires_days=2)
    token, token_id = minted["token"], minted["token_id"]
    presented: object = token
    expected = how
    if how == "missing":
        presented = None
    elif how == "malformed":
        presented = token.upper()
    elif how == "forged":
        presented = token[:-1] + ("0" if token[-1] != "0" else "1")
        expected = "mismatch"
    elif how == "unknown":
        presented = "mwt1-" + "ab" * 8 + token[21:]
        expected = "unknown-or-revoked"
    elif how == "expired":
        clock.advance(days=2, seconds=1)
    elif how in ("revoked", "removed"):
        (served.revoke_tokens if how == "revoked" else served.remove_member)("bob")
        expected = "unknown-or-revoked"
    else:  # someone with write access to the database widens the role or extends the expiry
        column, value = (("role", "steward") if how == "role-edited"
                         else ("expires_at", "2099-01-01T00:00:00Z"))
        conn = storage.connect(served.path)
        conn.execute(f"UPDATE member_tokens SET {column} = ? WHERE token_id = ?", (value, token_id))
        conn.close()
        expected = "mismatch"
    with pytest.raises(AuthenticationFailed) as caught:
        served.authenticate(presented, client="10.0.0.7", operation="budget")
    assert str(caught.value) == "authentication failed"
    refusal = _entries(served, "auth.token")[-1]
    assert refusal["decision"] == "refuse" and refusal["reasons"] == [expected]
    assert refusal["details"] == {"client": "10.0.0.7", "operation": "budget"}
    assert token[21:] not in str(refusal)


def test_tokens_need_a_served_vault(fresh_vault: Vault) -> None:
    with pytest.raises(UsageError):
        fresh_vault.add_member("bob", "analyst")
    with pytest.raises(UsageError):
        fresh_vault.issue_token("steward")
    with pytest.raises(AuthenticationFailed):
        fresh_vault.authenticate("mwt1-" + "0" * 16 + "-" + "0" * 64, client="c", operation="x")


def test_failures_are_throttled_per_client_and_counted_once(served: Vault, clock: ManualClock) -> None:
    token = served.add_member("bob", "analyst")["token"]
    for _ in range(10):
        with pytest.raises(AuthenticationFailed):
            served.authenticate("nonsense", client="10.0.0.9", operation="info")
    for _ in range(5):  # even the right token is not checked while throttled
        with pytest.raises(Throttled):
            served.authenticate(token, client="10.0.0.9", operation="info")
    assert served.authenticate(token, client="10.0.0.10", operation="info").member == "bob"
    logged = len(_entries(served, "auth.token"))
    clock.advance(seconds=61)
    assert served.authenticate(token, client="10.0.0.9", operation="info").member == "bob"
    counted = _entries(served, "auth.throttled")
    assert [e["details"] for e in counted] == [{"client": "10.0.0.9", "refused": 5}]
    assert len(_entries(served, "auth.token")) == logged + 1  # throttled refusals: no entry each


def test_issue_token_for_the_key_slot_steward_and_expiry_bounds(served: Vault) -> None:
    minted = served.issue_token("steward", expires_days=1)
    assert served.authenticate(minted["token"], client="c", operation="x").role == "steward"
    for bad in (0, 367, True, 2.5):
        with pytest.raises(UsageError):
            served.issue_token("steward", expires_days=bad)  # type: ignore[arg-type]
    with pytest.raises(NotFound):
        served.issue_token("nobody")


def test_a_copy_of_the_files_and_a_token_open_nothing(served: Vault, tmp_path: Path) -> None:
    """The analyst's whole kit: every file of the served vault and their token."""
    token = served.add_member("bob", "analyst")["token"]
    served.close()
    copy = tmp_path / "copy"
    shutil.copytree(served.path, copy)
    for member in ("bob", "steward", "ana"):
        for guess in (token, token.split("-")[2], TEST_PASSPHRASE, "analyst passphrase 1"):
            with pytest.raises(AuthenticationFailed):
                Vault.open(copy, guess, member=member)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.text(max_size=120) | st.binary(max_size=60) | st.integers())
def test_no_presented_value_authenticates(served: Vault, presented: object) -> None:
    """Property: nothing but an issued token gets in (hypothesis: arbitrary text, bytes, numbers)."""
    with pytest.raises((AuthenticationFailed, Throttled)):
        served.authenticate(presented, client=f"p{hash(repr(presented)) % 10**6}", operation="x")


def test_a_view_holds_every_per_instance_field_of_a_vault(served: Vault) -> None:
    """A field added to Vault.__init__ but not to the member view would break views at first
    use: the view carries the same instance fields (less the open-time pin flag)."""
    view = served.authenticate(served.issue_token("steward")["token"], client="c", operation="x")
    assert set(vars(view)) == set(vars(served)) - {"_pin_added"}
    assert view._shared is served._shared


def test_a_policy_applied_through_a_view_is_the_services_policy(served: Vault, tmp_path: Path) -> None:
    from tests.conftest import ROOT

    policy_dir = tmp_path / "policy"
    shutil.copytree(ROOT / "policies", policy_dir)
    first = policy_dir / sorted(p.name for p in policy_dir.glob("*.toml"))[0]
    first.write_text(first.read_text() + "\n# a comment changes the version\n")
    view = served.authenticate(served.issue_token("steward")["token"], client="c", operation="x")
    applied = view.apply_policy(policy_dir)
    assert served.policy.version == applied["version"] == view.policy.version
    assert served._engine is view._engine
