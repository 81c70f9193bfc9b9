"""The CLI edge: exit codes, one-line errors, --json, no tracebacks for bad input."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import TEST_PASSPHRASE
from vault import EXIT_CODES
from vault.cli.app import app, main


def run(capsys, *args: str) -> tuple[int, str, str]:
    code = main(list(args))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def env(monkeypatch, vault_path: Path) -> Path:
    monkeypatch.setenv("MINDWARD_PASSPHRASE", TEST_PASSPHRASE)
    monkeypatch.setenv("MINDWARD_VAULT", str(vault_path))
    return vault_path


def test_init_info_verify_round(capsys, env: Path) -> None:
    code, out, _ = run(capsys, "init", "--json")
    assert code == 0
    facts = json.loads(out)
    assert facts["fingerprint"].startswith("mw:") and len(facts["public_key"]) == 64
    code, out, _ = run(capsys, "info", "--json")
    assert code == 0 and json.loads(out)["vault_id"] == facts["vault_id"]
    code, out, _ = run(capsys, "audit", "verify", "--key", facts["public_key"], "--json")
    assert code == 0 and json.loads(out)["ok"] is True
    code, out, _ = run(capsys, "verify", "--json")
    assert code == 0 and json.loads(out)["ok"] is True


def test_wrong_passphrase_exit_code_and_one_line(capsys, env: Path, monkeypatch) -> None:
    assert run(capsys, "init")[0] == 0
    monkeypatch.setenv("MINDWARD_PASSPHRASE", "definitely the wrong one")
    code, out, err = run(capsys, "audit", "show")
    assert code == 3 and err.strip() == "mindward: error: wrong passphrase" and out == ""
    code, out, err = run(capsys, "audit", "show", "--json")
    assert code == 3 and json.loads(out) == {"error": "wrong passphrase", "exit_code": 3}


def test_missing_vault_is_not_found(capsys, env: Path) -> None:
    code, _, err = run(capsys, "info")
    assert code == 6 and err.count("\n") == 1 and "no vault" in err


def test_init_twice_is_a_conflict(capsys, env: Path) -> None:
    assert run(capsys, "init")[0] == 0
    code, _, err = run(capsys, "init")
    assert code == 7 and "not empty" in err


def test_tampered_log_exits_with_integrity_code(capsys, env: Path) -> None:
    import sqlite3

    assert run(capsys, "init")[0] == 0
    conn = sqlite3.connect(env / "vault.db")
    conn.execute("DROP TRIGGER audit_log_no_update")
    conn.execute("UPDATE audit_log SET entry = CAST('{\"seq\":0,\"x\":1}' AS BLOB) WHERE seq = 0")
    conn.commit()
    conn.close()
    code, out, _err = run(capsys, "audit", "verify")
    assert code == 5 and "FAILED" in out and "entry 0" in out


def test_bad_key_and_bad_arguments_are_usage_errors(capsys, env: Path) -> None:
    assert run(capsys, "init")[0] == 0
    assert run(capsys, "audit", "verify", "--key", "zz")[0] == 2
    assert run(capsys, "audit", "prove", "-1")[0] == 2
    assert run(capsys, "no-such-command")[0] == 2


def test_proof_round_trip_through_files(capsys, env: Path, tmp_path: Path) -> None:
    _, out, _ = run(capsys, "init", "--json")
    key = json.loads(out)["public_key"]
    code, out, _ = run(capsys, "audit", "prove", "0")
    assert code == 0
    proof = tmp_path / "proof.json"
    proof.write_text(out)
    assert run(capsys, "audit", "check-proof", str(proof), "--key", key)[0] == 0
    proof.write_text(out.replace("vault.init", "vault.edit"))
    assert run(capsys, "audit", "check-proof", str(proof), "--key", key)[0] == 5
    proof.write_text("not json")
    assert run(capsys, "audit", "check-proof", str(proof), "--key", key)[0] == 8


def test_no_passphrase_and_no_terminal_is_a_clear_error(capsys, env: Path, monkeypatch) -> None:
    monkeypatch.delenv("MINDWARD_PASSPHRASE")
    with open("/dev/null") as devnull:
        monkeypatch.setattr(sys, "stdin", devnull)
        code, _, err = run(capsys, "init")
    assert code == 3 and "MINDWARD_PASSPHRASE" in err


def test_every_command_has_help_and_is_documented() -> None:
    """Each command has help text and appears in docs/cli.md (sqlite-utils' habit)."""
    import typer.main

    docs = (Path(__file__).parents[2] / "docs" / "cli.md").read_text()
    group = typer.main.get_command(app)
    names: list[tuple[str, object]] = []
    for name, cmd in group.commands.items():  # type: ignore[attr-defined]
        subs = getattr(cmd, "commands", None)
        names += [(f"{name} {s}", c) for s, c in subs.items()] if subs else [(name, cmd)]
    for name, cmd in names:
        assert getattr(cmd, "help", None), f"'{name}' has no help"
        assert f"mindward {name}" in docs, f"'mindward {name}' missing from docs/cli.md"
    for code in EXIT_CODES:
        assert f"| {code} |" in docs, f"exit code {code} missing from docs/cli.md"


def test_console_script_entry_point_runs() -> None:
    out = subprocess.run([sys.executable, "-m", "vault", "--help"], capture_output=True, text=True,
                         check=True)
    assert "mindward" in out.stdout and "Traceback" not in out.stderr
