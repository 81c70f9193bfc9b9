"""Key hierarchy and vault lifecycle: passphrases, rekey, locking, cryptographic erase."""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import pytest

import vault
from tests.conftest import TEST_PASSPHRASE, files_of
from vault import AuthenticationFailed, Conflict, NotFound, UsageError, Vault, crypto


def _snapshot(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in files_of(root) if p.name != "lock"}


def test_wrong_passphrase_is_refused_and_changes_nothing(vault_path: Path) -> None:
    Vault.init(vault_path, TEST_PASSPHRASE).close()
    before = _snapshot(vault_path)
    with pytest.raises(AuthenticationFailed, match="wrong passphrase"):
        Vault.open(vault_path, "not the passphrase at all")
    with pytest.raises(AuthenticationFailed, match="no member"):
        Vault.open(vault_path, TEST_PASSPHRASE, member="mallory")
    assert _snapshot(vault_path) == before


def test_kdf_parameters_meet_rfc9106_second_option(vault_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        kdf = json.loads(v._conn.execute("SELECT kdf FROM keyslots").fetchone()[0])["kdf"]
    # RFC 9106 section 4, second recommended option: t=3, p=4, m=2^16 KiB, 128-bit salt
    assert kdf["algorithm"] == "argon2id"
    assert kdf["iterations"] >= 3 and kdf["memory_kib"] >= 65536 and kdf["lanes"] == 4
    assert len(bytes.fromhex(kdf["salt"])) >= 16
    weak = crypto.KdfParams(salt=os.urandom(16), iterations=1, memory_kib=65536)
    with pytest.raises(UsageError):
        crypto.passphrase_key("x" * 20, weak)
    with pytest.raises(UsageError):
        crypto.passphrase_key("x" * 20, crypto.KdfParams(salt=os.urandom(16), memory_kib=4096))


def test_short_passphrase_refused(vault_path: Path) -> None:
    with pytest.raises(UsageError):
        Vault.init(vault_path, "short")
    assert not vault_path.exists()


def test_init_refuses_a_non_empty_directory(tmp_path: Path) -> None:
    (tmp_path / "thesis.txt").write_text("not a vault")
    with pytest.raises(Conflict):
        Vault.init(tmp_path, TEST_PASSPHRASE)
    assert [p.name for p in tmp_path.iterdir()] == ["thesis.txt"]


def test_open_of_a_missing_or_foreign_vault(tmp_path: Path) -> None:
    with pytest.raises(NotFound):
        Vault.open(tmp_path / "nowhere", TEST_PASSPHRASE)
    (tmp_path / "fake").mkdir()
    (tmp_path / "fake" / "vault.db").write_bytes(b"this is not sqlite at all" * 100)
    with pytest.raises(vault.IntegrityError):
        Vault.open(tmp_path / "fake", TEST_PASSPHRASE)
    with pytest.raises(vault.IntegrityError):
        vault.describe(tmp_path / "fake")


def test_rekey_rewraps_keys_and_never_touches_data(vault_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        pid = v.new_participant()
        info = v.put_blob(pid, "eeg", [b"signal" * 10000])
        blob_before = v._door._blobs.path(info.blob_id).read_bytes()
        wrapped_before = v._conn.execute("SELECT wrapped_key FROM participants").fetchone()[0]
        slot_before = v._conn.execute("SELECT wrapped_master FROM keyslots").fetchone()[0]
        fingerprint = v.info()["fingerprint"]
        assert v.rekey("a brand new passphrase") == {"keys_rewrapped": 1, "member_slots_dropped": 0}
        assert v._door._blobs.path(info.blob_id).read_bytes() == blob_before
        assert v._conn.execute("SELECT wrapped_key FROM participants").fetchone()[0] != wrapped_before
        assert v._conn.execute("SELECT wrapped_master FROM keyslots").fetchone()[0] != slot_before
    with pytest.raises(AuthenticationFailed):
        Vault.open(vault_path, TEST_PASSPHRASE)
    with Vault.open(vault_path, "a brand new passphrase") as v:
        key = v._door._ring.participant_key(v._conn, pid)
        assert b"".join(v._door._blobs._decrypt(key, pid, info.blob_id)) == b"signal" * 10000
        assert v.info()["fingerprint"] == fingerprint  # same signing key, re-wrapped
        assert v.verify()["ok"]
        assert "vault.rekey" in [e["action"] for e in v.audit_entries()]


def test_destroying_the_wrapped_key_erases_the_data(vault_path: Path) -> None:
    """Cryptographic erase (NIST SP 800-88): without the wrapped key, the master key is useless."""
    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        pid = v.new_participant()
        keep = v.new_participant()
        gone = v.put_blob(pid, "eeg", [b"A" * 5000])
        kept = v.put_blob(keep, "eeg", [b"B" * 5000])
        key = v._door._ring.participant_key(v._conn, pid)
        v._conn.execute("UPDATE participants SET wrapped_key = NULL WHERE pid = ?", (pid,))
        vault.storage.db.checkpoint(v._conn)
        with pytest.raises(NotFound, match="erased"):
            v._door._ring.participant_key(v._conn, pid)
        with pytest.raises(vault.IntegrityError):
            b"".join(v._door._blobs._decrypt(os.urandom(32), pid, gone.blob_id))
        other = v._door._ring.participant_key(v._conn, keep)
        assert b"".join(v._door._blobs._decrypt(other, keep, kept.blob_id)) == b"B" * 5000
    for path in files_of(vault_path):
        assert key not in path.read_bytes()


def test_second_process_waits_then_gets_a_clear_busy_error(vault_path: Path, monkeypatch) -> None:
    from vault import api

    monkeypatch.setattr(api, "_LOCK_WAIT_S", 0.2)
    with Vault.init(vault_path, TEST_PASSPHRASE), pytest.raises(Conflict, match="busy"):
        Vault.open(vault_path, TEST_PASSPHRASE)
    Vault.open(vault_path, TEST_PASSPHRASE).close()


def test_info_needs_no_passphrase_and_matches_the_key(fresh_vault: Vault) -> None:
    facts = vault.describe(fresh_vault.path)
    assert facts["public_key"] == fresh_vault.public_key.hex()
    assert facts["fingerprint"] == crypto.fingerprint(fresh_vault.public_key)
    assert facts["vault_id"] == fresh_vault.vault_id


def test_keys_and_vaults_refuse_pickling(fresh_vault: Vault) -> None:
    import pickle

    for obj in (fresh_vault, fresh_vault._door._ring, fresh_vault._signing):
        with pytest.raises(TypeError):
            pickle.dumps(obj)
