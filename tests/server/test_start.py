"""Starting and stopping the service: what it refuses before it unlocks anything, the start line,
and a clean stop that closes the vault (a tree head signed over the session)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import TEST_PASSPHRASE
from tests.server.conftest import launch


def _refused(proc: subprocess.Popen[bytes]) -> tuple[int, dict, str]:
    out, err = proc.communicate(timeout=120)
    text = err.decode()
    assert text.count("\n") == 1 and "Traceback" not in text, text
    return proc.returncode, json.loads(out), text


@pytest.mark.parametrize("host", ["0.0.0.0", "192.0.2.10", "::", "lab-server.example"])
def test_a_non_loopback_address_without_tls_is_refused(tmp_path: Path, host: str) -> None:
    code, body, err = _refused(launch(tmp_path / "nowhere", "--host", host))
    assert code == 2 and body["exit_code"] == 2
    assert "--host" in err and "TLS" in err


@pytest.mark.parametrize("host", ["127.0.0.1", "::1", "localhost", "127.8.9.10"])
def test_loopback_addresses_pass_the_address_check(tmp_path: Path, host: str) -> None:
    """Here the address is fine and the next check (no vault there) answers: exit 6, not 2."""
    code, body, _ = _refused(launch(tmp_path / "nowhere", "--host", host))
    assert (code, body["exit_code"]) == (6, 6)


def test_half_a_tls_pair_is_refused(tmp_path: Path) -> None:
    cert = tmp_path / "cert.pem"
    cert.write_text("not used")
    code, _, err = _refused(launch(tmp_path / "nowhere", "--tls-cert", str(cert)))
    assert code == 2 and "key" in err


@pytest.mark.parametrize("mode", [0o640, 0o604, 0o644, 0o660])
def test_a_credentials_file_others_can_read_is_refused(tmp_path: Path, mode: int) -> None:
    creds = tmp_path / "credentials"
    creds.write_text(TEST_PASSPHRASE + "\n")
    os.chmod(creds, mode)
    code, body, err = _refused(launch(tmp_path / "nowhere", "--credentials", str(creds),
                                      passphrase=None))
    assert code == 3 and body["exit_code"] == 3
    assert "chmod 600" in err and TEST_PASSPHRASE not in err


def test_a_credentials_link_is_refused(tmp_path: Path) -> None:
    """A symlink could point the service at someone else's file: refused, not followed."""
    real = tmp_path / "real"
    real.write_text(TEST_PASSPHRASE)
    os.chmod(real, 0o600)
    (tmp_path / "link").symlink_to(real)
    code, _, _ = _refused(launch(tmp_path / "nowhere", "--credentials", str(tmp_path / "link"),
                                 passphrase=None))
    assert code == 3


def test_without_a_passphrase_and_no_terminal_it_says_so(tmp_path: Path) -> None:
    from vault import Vault

    Vault.init(tmp_path / "v", TEST_PASSPHRASE).close()
    code, _, err = _refused(launch(tmp_path / "v", passphrase=None))
    assert code == 3 and "MINDWARD_PASSPHRASE" in err


def test_a_vault_that_is_not_served_is_refused_with_the_conversion_hint(tmp_path: Path) -> None:
    from vault import Vault

    Vault.init(tmp_path / "v", TEST_PASSPHRASE).close()
    code, body, err = _refused(launch(tmp_path / "v"))
    assert code == 2 and body["exit_code"] == 2 and "serve-setup" in err


def test_the_start_line_states_the_vault_and_the_sweep_and_a_stop_closes_the_vault(
        tmp_path: Path, serve) -> None:
    from vault import Vault, describe, verify_audit

    with Vault.init(tmp_path / "v", TEST_PASSPHRASE) as v:
        v.make_served(TEST_PASSPHRASE)
        token = v.issue_token("steward")["token"]
    running = serve(tmp_path / "v", "--sweep-every-hours", "6")
    facts = describe(tmp_path / "v")
    assert running.start["vault_id"] == facts["vault_id"]
    assert running.start["fingerprint"] == facts["fingerprint"]
    assert running.start["sweep_every_hours"] == 6
    assert running.url.startswith("http://127.0.0.1:")
    with running.client(token) as http:
        info = http.get("/v1/info").json()
        assert info["sweep_every_hours"] == 6 and info["role"] == "steward"
        assert http.get("/v1/health").json() == {"ok": True}
    assert running.stop() == 0
    after = describe(tmp_path / "v")
    # the session's entries (the token's use) are under a head signed at close
    assert after["latest_tree_head"]["tree_size"] == after["audit_entries"] > facts["audit_entries"]
    assert verify_audit(tmp_path / "v").ok


def test_the_text_start_line_is_one_line(tmp_path: Path) -> None:
    from vault import Vault

    with Vault.init(tmp_path / "v", TEST_PASSPHRASE) as v:
        v.make_served(TEST_PASSPHRASE)
    env = {k: v for k, v in os.environ.items() if not k.startswith("MINDWARD_")}
    with subprocess.Popen([sys.executable, "-m", "vault", "serve", "--vault", str(tmp_path / "v"),
                           "--port", "0", "--sweep-every-hours", "0"],
                          stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL,
                          env={**env, "MINDWARD_PASSPHRASE": TEST_PASSPHRASE}) as proc:
        try:
            line = proc.stdout.readline().decode()
            assert line.startswith("mindward: serving vault ") and "no scheduled sweep" in line
        finally:
            proc.terminate()
            _, err = proc.communicate(timeout=120)
        assert proc.returncode == 0
        assert "Caution" in err.decode()
