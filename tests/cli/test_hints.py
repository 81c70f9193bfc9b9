"""The library says what is wrong in its own terms; the command line adds its options and
commands (VaultError.param / .hint, worded by vault/cli/hints.py)."""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

import vault
from vault.cli.hints import COMMANDS, OPTIONS, cli_message
from vault.errors import HINTS, IntegrityError, InvalidInput, UsageError

PACKAGE = Path(vault.__file__).parent
CLI_TERMS = re.compile(r"[`']mindward [a-z]|(?:^|[\s(':`])--[a-z]")
# files whose messages still name commands or options; each entry must go when its file is clean
# (the test below says so). None today.
PENDING: set[str] = set()


def _library_files() -> list[Path]:
    return sorted(p for p in PACKAGE.rglob("*.py") if "cli" not in p.relative_to(PACKAGE).parts)


def _strings(tree: ast.AST) -> list[tuple[int, str]]:
    """String literals (f-string parts too), docstrings left out."""
    docs = {id(n.value) for n in ast.walk(tree) if isinstance(n, ast.Expr)
            and isinstance(n.value, ast.Constant)}
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Constant) and isinstance(node.value, str) and id(node) not in docs:
            found.append((node.lineno, node.value))
    return found


def _cli_terms(path: Path) -> list[str]:
    return [f"{path.name}:{line}: {text[:60]!r}" for line, text in _strings(ast.parse(path.read_text()))
            if CLI_TERMS.search(text)]


@pytest.mark.parametrize("path", _library_files(), ids=lambda p: p.relative_to(PACKAGE).as_posix())
def test_library_messages_name_no_command_or_option(path: Path) -> None:
    rel = path.relative_to(PACKAGE).as_posix()
    found = _cli_terms(path)
    if rel in PENDING:
        assert found, f"{rel} is clean now: take it off PENDING"
    else:
        assert not found, found


def test_the_scan_sees_a_planted_command_and_option(tmp_path: Path) -> None:
    planted = tmp_path / "planted.py"
    planted.write_text('"""Docstrings may say `mindward init`."""\n'
                       "def f(n):\n    raise ValueError(f\"row {n}: run 'mindward audit verify'\")\n"
                       "def g():\n    raise ValueError('--scope is full')\n")
    assert len(_cli_terms(planted)) == 2


def _keyword_literals(name: str) -> set[str]:
    found = set()
    for path in _library_files():
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.keyword) and node.arg == name and isinstance(node.value, ast.Constant):
                found.add(node.value.value)
    return found


def test_every_hint_used_is_known_and_worded_by_the_cli() -> None:
    used = _keyword_literals("hint")
    assert used, "no library error carries a hint: the scan is broken"
    assert used <= set(HINTS)
    assert set(COMMANDS) == set(HINTS)


def test_every_param_used_has_its_option() -> None:
    assert _keyword_literals("param") <= set(OPTIONS)


def test_cli_message_leads_with_the_option_and_ends_with_the_command() -> None:
    exc = UsageError("lies in the future", param="received")
    assert cli_message(exc) == "--received: lies in the future"
    assert exc.message == "lies in the future"  # the library's own words are unchanged
    exc = IntegrityError("the audit log has a gap", hint="verify-audit")
    assert cli_message(exc) == "the audit log has a gap (run 'mindward audit verify')"
    assert cli_message(InvalidInput("plain")) == "plain"
    assert cli_message(UsageError("--unit is wrong", param="unit")) == "--unit is wrong"


def test_a_scores_file_error_names_the_enrol_command_on_the_cli_only(tmp_path, monkeypatch,
                                                                     capsys) -> None:
    from tests.conftest import TEST_PASSPHRASE
    from vault import Vault
    from vault.cli.app import main

    Vault.init(tmp_path / "v", TEST_PASSPHRASE).close()
    bad = tmp_path / "scores.csv"
    bad.write_text("participant_id,item_id,value\nnot-a-pid,dish-01,3\n")
    with Vault.open(tmp_path / "v", TEST_PASSPHRASE) as v, pytest.raises(InvalidInput) as caught:
        v.ingest_scores(bad, "explicit")
    assert "mindward" not in caught.value.message and caught.value.hint == "enrol"
    monkeypatch.setenv("MINDWARD_PASSPHRASE", TEST_PASSPHRASE)
    code = main(["ingest", "scores", str(bad), "--kind", "explicit", "--vault", str(tmp_path / "v")])
    assert code == InvalidInput.exit_code
    assert "as 'mindward enrol' printed" in capsys.readouterr().err
