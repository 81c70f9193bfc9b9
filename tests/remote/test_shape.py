"""RemoteVault is Vault-shaped: each method a member command calls has the local method's name
and parameters (so a notebook written against one runs against the other), and nothing that
needs the vault's own files or keys is offered remotely."""

from __future__ import annotations

import inspect

import pytest

import vault
from vault.api import Vault
from vault.remote import RemoteVault

# methods of the local Vault that the member commands call, remote too
SAME = ["info", "access_summary", "budget", "audit_entries", "sign_head", "members", "add_member",
        "issue_token", "revoke_tokens", "remove_member", "enrol", "amend_consent", "consent_history",
        "ingest_eeg", "ingest_scores", "export_eeg", "export_matrix", "check_export",
        "policy_document", "apply_policy", "withdraw_request", "withdraw_pending", "withdraw_process",
        "withdraw_receipt", "sweep", "report", "verify"]
# local parameters a service does not take, and why
NOT_REMOTE = {("budget", "show_participants"): "the service shows what the caller's role sees"}
# the key-free functions, as methods: the same parameters less the vault's path
KEY_FREE = {"prove": vault.prove, "check_consistency": vault.check_consistency,
            "verify_audit": vault.verify_audit}
# what needs the vault's files, its keys or its thread, and is not offered remotely
LOCAL_ONLY = ["rekey", "make_served", "authenticate", "put_blob", "new_participant", "read_blob",
              "read_blobs", "authorize", "blobs", "readable", "export_members"]


def _params(fn, drop: int = 0) -> list[tuple[str, inspect._ParameterKind]]:
    params = list(inspect.signature(fn).parameters.values())[drop:]
    return [(p.name, p.kind) for p in params]


@pytest.mark.parametrize("name", SAME)
def test_each_member_method_has_the_local_name_and_parameters(name: str) -> None:
    local = [p for p in _params(getattr(Vault, name), drop=1) if (name, p[0]) not in NOT_REMOTE]
    assert _params(getattr(RemoteVault, name), drop=1) == local


@pytest.mark.parametrize("name", sorted(KEY_FREE))
def test_the_key_free_checks_take_the_functions_parameters_less_the_path(name: str) -> None:
    assert _params(getattr(RemoteVault, name), drop=1) == _params(KEY_FREE[name], drop=1)


@pytest.mark.parametrize("name", LOCAL_ONLY)
def test_what_needs_the_vaults_files_or_keys_is_not_offered(name: str) -> None:
    assert hasattr(Vault, name) and not hasattr(RemoteVault, name)


def test_member_and_role_are_read_only_facts() -> None:
    for name in ("member", "role", "public_key"):
        assert isinstance(getattr(RemoteVault, name), property)
        assert getattr(RemoteVault, name).fset is None


def test_a_session_cannot_be_pickled() -> None:
    with pytest.raises(TypeError):
        RemoteVault.__reduce__(object.__new__(RemoteVault))
