"""The public surface of `vault`: a small, exact __all__ whose every name loads, and nothing that
speaks for the command line (renderers, the demo runner)."""

from __future__ import annotations

import importlib.metadata
import inspect
import subprocess
import sys

import pytest

import vault
from vault.errors import VaultError

ERRORS = {"VaultError", "UsageError", "AuthenticationFailed", "PolicyRefusal", "IntegrityError",
          "NotFound", "Conflict", "InvalidInput", "StorageFull", "Throttled", "Unreachable"}
VERIFIERS = {"verify_audit", "verify_proof", "verify_export", "verify_receipt_file",
             "check_consistency", "prove", "read_tree_head", "describe", "read_audit_log",
             "parse_public_key"}
READERS = {"load_json", "read_items", "load_policy_dir", "check_output_path", "write_output"}


def test_all_is_exactly_the_facade_the_verifiers_readers_and_the_error_tree() -> None:
    assert set(vault.__all__) == {"Vault", "EXIT_CODES"} | ERRORS | VERIFIERS | READERS
    assert len(vault.__all__) == len(set(vault.__all__))


@pytest.mark.parametrize("name", sorted(vault.__all__))
def test_every_public_name_resolves_in_a_fresh_interpreter(name: str) -> None:
    """Each name loads on its own (PEP 562), in a process where nothing else imported it first."""
    code = f"import vault; obj = vault.{name}; print(type(obj).__name__)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip()
    assert getattr(vault, name) is not None


def test_the_lazy_names_are_the_library_objects() -> None:
    from vault import api

    assert vault.Vault is api.Vault and vault.verify_audit is api.verify_audit
    assert all(issubclass(getattr(vault, e), VaultError) for e in ERRORS)
    assert set(vault.__all__) <= set(dir(vault))


@pytest.mark.parametrize("name", ["format_decision", "summarise_decision", "report_markdown",
                                  "format_budget", "describe_policy", "run_demo", "nonexistent"])
def test_renderers_and_the_demo_are_not_library_names(name: str) -> None:
    with pytest.raises(AttributeError, match=name):
        getattr(vault, name)


def test_no_public_callable_returns_cli_text() -> None:
    """A renderer planted back in __all__ would show in its name or its return annotation."""
    for name in vault.__all__:
        obj = getattr(vault, name)
        assert not name.startswith(("format_", "summarise_", "render")), name
        if inspect.isfunction(obj):
            assert "markdown" not in name, name


def test_the_version_is_the_installed_distributions() -> None:
    assert vault.__version__ == importlib.metadata.version("mindward")


def test_export_members_is_for_stewards_only_and_audited(fresh_vault, vault_path) -> None:
    """The lineage method the demo uses instead of reading the database: an analyst is refused
    and the refusal is in the log; a steward asking for an unknown export gets NotFound."""
    from tests.conftest import TEST_PASSPHRASE
    from vault import NotFound, PolicyRefusal, Vault

    fresh_vault.add_member("ana", "analyst", TEST_PASSPHRASE + " ana")
    with pytest.raises(NotFound, match="no export"):
        fresh_vault.export_members("x-unknown")
    fresh_vault.close()
    with Vault.open(vault_path, TEST_PASSPHRASE + " ana", member="ana") as a, \
            pytest.raises(PolicyRefusal, match="stewards only"):
        a.export_members("x-unknown")
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        last = v.audit_entries()[-1]
    assert (last["action"], last["decision"], last["actor"]) == ("export.members", "refuse", "ana")
