"""The command line of a served vault's set-up: conversion, token members, key-slot facts."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tests.cli.test_cli import run
from tests.conftest import TEST_PASSPHRASE

SERVICE_PASSPHRASE = "the service's own passphrase"


@pytest.fixture
def served(capsys, monkeypatch, vault_path: Path) -> Path:
    monkeypatch.setenv("MINDWARD_PASSPHRASE", TEST_PASSPHRASE)
    monkeypatch.setenv("MINDWARD_VAULT", str(vault_path))
    assert run(capsys, "init")[0] == 0
    monkeypatch.setenv("MINDWARD_NEW_PASSPHRASE", "an analyst's passphrase")
    assert run(capsys, "member", "add", "ana", "--role", "analyst")[0] == 0
    monkeypatch.setenv("MINDWARD_NEW_PASSPHRASE", SERVICE_PASSPHRASE)
    code, out, _ = run(capsys, "serve-setup", "--json")
    assert code == 0 and json.loads(out)["slots_dropped"] == ["ana"]
    monkeypatch.setenv("MINDWARD_PASSPHRASE", SERVICE_PASSPHRASE)
    monkeypatch.delenv("MINDWARD_NEW_PASSPHRASE")
    return vault_path


def test_info_counts_key_slots_and_names_whose(capsys, served: Path) -> None:
    code, out, _ = run(capsys, "info", "--json")
    facts = json.loads(out)
    assert code == 0 and facts["served"] is True and facts["token_members"] == 0
    assert facts["key_slots"] == [{"member": "steward", "role": "steward"}]
    code, out, _ = run(capsys, "info")
    assert "key slots: 1 (steward steward)" in out


def test_member_add_prints_a_token_once_and_needs_no_passphrase(capsys, served: Path) -> None:
    code, out, _ = run(capsys, "member", "add", "bob", "--role", "auditor", "--expires-days", "3",
                       "--json")
    minted = json.loads(out)
    assert code == 0 and minted["token"].startswith("mwt1-") and minted["role"] == "auditor"
    code, out, _ = run(capsys, "member", "list", "--json")
    rows = {r["member"]: r for r in json.loads(out)}
    assert rows["bob"]["key_slot"] is False and rows["bob"]["tokens"] == 1
    assert minted["token"] not in out
    code, out, _ = run(capsys, "member", "token", "bob")
    assert code == 0 and "shown only now" in out and "mwt1-" in out
    code, out, _ = run(capsys, "member", "revoke", "bob", "--json")
    assert code == 0 and json.loads(out) == {"member": "bob", "revoked": 2}


def test_an_analyst_key_slot_is_refused_on_a_served_vault(capsys, served: Path, monkeypatch) -> None:
    monkeypatch.setenv("MINDWARD_NEW_PASSPHRASE", "a passphrase for carl")
    code, _, err = run(capsys, "member", "add", "carl", "--role", "analyst", "--key-slot")
    assert code == 2 and "only stewards hold a key slot" in err and err.count("\n") == 1
    code, _, err = run(capsys, "member", "add", "carl", "--role", "steward", "--key-slot")
    assert code == 0


def test_tokens_are_refused_on_a_vault_that_is_not_served(capsys, monkeypatch, vault_path: Path) -> None:
    monkeypatch.setenv("MINDWARD_PASSPHRASE", TEST_PASSPHRASE)
    monkeypatch.setenv("MINDWARD_VAULT", str(vault_path))
    assert run(capsys, "init")[0] == 0
    code, _, err = run(capsys, "member", "token", "steward")
    assert code == 2 and "serve-setup" in err
    monkeypatch.setenv("MINDWARD_NEW_PASSPHRASE", "a passphrase for x 123")
    code, _, err = run(capsys, "member", "add", "x", "--role", "bogus")
    assert code == 2 and "--role" in err
