"""An analyst holding a copy of the served vault's files and their own token cannot decrypt
anything: token-only members have no key slot, so no passphrase they could hold opens the copy
(tried with the library, every way we know), and the copy holds no plaintext we put in."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from tests.conftest import TEST_PASSPHRASE, assert_absent
from tests.server.conftest import edf_file


def test_a_copy_and_a_token_open_nothing(lab, tmp_path: Path) -> None:
    from vault import AuthenticationFailed, PolicyRefusal, Vault, VaultError, describe, read_audit_log

    copy = tmp_path / "copy"
    shutil.copytree(lab.vault, copy)
    (copy / "lock").unlink(missing_ok=True)
    token = lab.tokens["analyst"]
    _, token_id, secret = token.split("-")
    facts = describe(copy)
    assert facts["served"] is True
    assert {s["member"] for s in facts["key_slots"]} == {"steward"}  # no analyst or auditor slot
    guesses = [token, secret, token_id, token.upper(), "", TEST_PASSPHRASE[:-1], "omar",
               facts["vault_id"], facts["public_key"]]
    for member in ("omar", "ines", "rita", "steward"):
        for guess in guesses:
            with pytest.raises(VaultError) as refused:
                Vault.open(copy, guess, member=member).close()
            assert isinstance(refused.value, AuthenticationFailed | PolicyRefusal), refused.value
            with pytest.raises(VaultError):
                read_audit_log(copy, guess, member=member)
    with pytest.raises(VaultError):  # a copy is not a service: tokens authenticate nothing there
        Vault.open(copy, token)
    # the recording's signal bytes are nowhere in the copy in clear (a stretch from its data records)
    data = edf_file().read_bytes()
    header = int(data[184:192].decode().strip())  # EDF header size: bytes 184-191 (EDF spec)
    assert_absent(copy, data[header + 4096: header + 4160], secret.encode())
