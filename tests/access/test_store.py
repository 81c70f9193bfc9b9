"""Adversarial tests of the encrypted blob store (flip, drop, reorder, swap, move)."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.conftest import TEST_PASSPHRASE, assert_absent
from vault import IntegrityError, Vault
from vault.access.blobs import _WHOLE_READ
from vault.crypto.sealing import CHUNK_SIZE, CT_CHUNK_SIZE, HEADER_SIZE, SALT_SIZE, TAG_SIZE

# Blobs up to _WHOLE_READ bytes are read and authenticated in one piece, larger ones streamed:
# the adversarial tests run on both paths. `extra` full chunks move a blob past the threshold.
PATHS = {"whole-read": 0, "streamed": _WHOLE_READ // CHUNK_SIZE + 1}


def _read(v: Vault, pid: str, blob_id: str) -> bytes:
    # Tests reach past the one door on purpose: they check the store itself.
    key = v._door._ring.participant_key(v._conn, pid)
    return b"".join(v._door._blobs._decrypt(key, pid, blob_id))


def _stored(v: Vault, n_bytes: int, marker: bytes = b"") -> tuple[str, str, bytes, Path]:
    pid = v.new_participant()
    data = marker + os.urandom(n_bytes)
    info = v.put_blob(pid, "eeg", [data[i : i + 7000] for i in range(0, len(data), 7000)])
    return pid, info.blob_id, data, v._door._blobs.path(info.blob_id)


def test_round_trip_and_size_accounting(fresh_vault: Vault) -> None:
    pid, blob_id, data, path = _stored(fresh_vault, 3 * CHUNK_SIZE + 5)
    assert _read(fresh_vault, pid, blob_id) == data
    assert path.stat().st_size == HEADER_SIZE + len(data) + 4 * TAG_SIZE
    assert fresh_vault.verify()["ok"]


@pytest.mark.parametrize("extra", PATHS.values(), ids=PATHS.keys())
@pytest.mark.parametrize("where", ["salt", "commitment", "first-body", "first-tag",
                                   "middle-body", "final-body", "final-tag"])
def test_every_position_class_flip_is_detected(fresh_vault: Vault, where: str, extra: int) -> None:
    pid, blob_id, _, path = _stored(fresh_vault, (2 + extra) * CHUNK_SIZE + 100)
    assert (path.stat().st_size > _WHOLE_READ) == (extra > 0)
    final_start = HEADER_SIZE + (2 + extra) * CT_CHUNK_SIZE
    offset = {
        "salt": 3, "commitment": SALT_SIZE + 5, "first-body": HEADER_SIZE + 10,
        "first-tag": HEADER_SIZE + CT_CHUNK_SIZE - 1,
        "middle-body": HEADER_SIZE + CT_CHUNK_SIZE + 999,
        "final-body": final_start + 50, "final-tag": path.stat().st_size - 1,
    }[where]
    raw = bytearray(path.read_bytes())
    raw[offset] ^= 0x01
    path.write_bytes(bytes(raw))
    with pytest.raises(IntegrityError):
        _read(fresh_vault, pid, blob_id)
    assert fresh_vault.verify()["blobs_failed"] == [blob_id]


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(offset=st.integers(min_value=0), bit=st.integers(min_value=0, max_value=7))
def test_any_single_bit_flip_is_detected(fresh_vault: Vault, offset: int, bit: int) -> None:
    if not hasattr(test_any_single_bit_flip_is_detected, "blob"):
        test_any_single_bit_flip_is_detected.blob = _stored(fresh_vault, CHUNK_SIZE + 300)  # type: ignore[attr-defined]
    pid, blob_id, data, path = test_any_single_bit_flip_is_detected.blob  # type: ignore[attr-defined]
    original = path.read_bytes()
    raw = bytearray(original)
    raw[offset % len(raw)] ^= 1 << bit
    path.write_bytes(bytes(raw))
    try:
        with pytest.raises(IntegrityError):
            _read(fresh_vault, pid, blob_id)
    finally:
        path.write_bytes(original)
    assert _read(fresh_vault, pid, blob_id) == data


def _chunks(raw: bytes) -> tuple[bytes, list[bytes]]:
    body = raw[HEADER_SIZE:]
    return raw[:HEADER_SIZE], [body[i : i + CT_CHUNK_SIZE] for i in range(0, len(body), CT_CHUNK_SIZE)]


@pytest.mark.parametrize("extra", PATHS.values(), ids=PATHS.keys())
@pytest.mark.parametrize("attack", ["drop-first", "drop-final", "duplicate", "swap", "append",
                                    "truncate-mid-chunk", "truncate-to-header", "empty-file"])
def test_chunk_level_attacks_are_detected(fresh_vault: Vault, attack: str, extra: int) -> None:
    pid, blob_id, data, path = _stored(fresh_vault, (3 + extra) * CHUNK_SIZE + 10)
    assert (path.stat().st_size > _WHOLE_READ) == (extra > 0)
    assert _read(fresh_vault, pid, blob_id) == data
    header, chunks = _chunks(path.read_bytes())
    assert len(chunks) == 4 + extra
    forged = {
        "drop-first": header + b"".join(chunks[1:]),
        "drop-final": header + b"".join(chunks[:-1]),
        "duplicate": header + chunks[0] + chunks[0] + b"".join(chunks[2:]),
        "swap": header + chunks[1] + chunks[0] + b"".join(chunks[2:]),
        "append": header + b"".join(chunks) + chunks[0],
        "truncate-mid-chunk": header + b"".join(chunks)[: CT_CHUNK_SIZE + 77],
        "truncate-to-header": header,
        "empty-file": b"",
    }[attack]
    path.write_bytes(forged)
    handed_out = bytearray()
    key = fresh_vault._door._ring.participant_key(fresh_vault._conn, pid)
    with pytest.raises(IntegrityError):
        for chunk in fresh_vault._door._blobs._decrypt(key, pid, blob_id):
            handed_out += chunk
    # whatever a streaming reader handed out before failing is a true prefix
    assert data.startswith(bytes(handed_out))


def test_blob_moved_to_another_participant_or_slot_fails_commitment(fresh_vault: Vault) -> None:
    pid_a, blob_a, _, path_a = _stored(fresh_vault, 1000)
    pid_b, blob_b, data_b, path_b = _stored(fresh_vault, 1000)
    pid_b2 = pid_b
    info_b2 = fresh_vault.put_blob(pid_b2, "eeg", [data_b])
    # swap two participants' blobs
    a, b = path_a.read_bytes(), path_b.read_bytes()
    path_a.write_bytes(b)
    path_b.write_bytes(a)
    for pid, blob in ((pid_a, blob_a), (pid_b, blob_b)):
        with pytest.raises(IntegrityError, match="commitment"):
            _read(fresh_vault, pid, blob)
    # same participant, other slot: the blob id is in the context too
    path_b.write_bytes(b)
    fresh_vault._door._blobs.path(info_b2.blob_id).write_bytes(b)
    with pytest.raises(IntegrityError, match="commitment"):
        _read(fresh_vault, pid_b2, info_b2.blob_id)


def test_plaintext_marker_never_reaches_disk(vault_path: Path) -> None:
    marker = b"PLAINTEXT-MARKER-7f3a9c"
    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        pid = v.new_participant()
        payload = (marker + b" ") * 5000
        v.put_blob(pid, "eeg", [payload[i : i + 4096] for i in range(0, len(payload), 4096)])
        key = v._door._ring.participant_key(v._conn, pid)
        # while open (WAL and SHM present) and after close
        assert_absent(vault_path, marker, key)
    assert_absent(vault_path, marker, key)
    assert not list((vault_path / "tmp").iterdir())


def test_failed_write_leaves_nothing(fresh_vault: Vault) -> None:
    pid = fresh_vault.new_participant()

    def exploding():
        yield b"x" * 50000
        raise RuntimeError("source failed mid-stream")

    with pytest.raises(RuntimeError):
        fresh_vault.put_blob(pid, "eeg", exploding())
    assert fresh_vault.blobs() == []
    assert not list((fresh_vault.path / "tmp").iterdir())
    assert not list((fresh_vault.path / "blobs").rglob("*.mwb"))


def test_disk_full_is_a_clear_error_and_stores_nothing(fresh_vault: Vault, monkeypatch) -> None:
    import errno

    from vault import StorageFull
    from vault.access import blobs as store

    pid = fresh_vault.new_participant()
    real_fsync = os.fsync

    def full(fd: int) -> None:
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(store.os, "fsync", full)
    with pytest.raises(StorageFull):
        fresh_vault.put_blob(pid, "eeg", [b"y" * 100000])
    monkeypatch.setattr(store.os, "fsync", real_fsync)
    assert fresh_vault.blobs() == []
    assert not list((fresh_vault.path / "tmp").iterdir())


def test_orphans_from_an_interrupted_write_are_removed_at_open(vault_path: Path) -> None:
    with Vault.init(vault_path, TEST_PASSPHRASE) as v:
        pid, blob_id, data, _ = _stored(v, 5000)
    (vault_path / "tmp" / "deadbeef.part").write_bytes(b"partial ciphertext")
    orphan = vault_path / "blobs" / "b-" / "b-0000orphan.mwb"
    orphan.parent.mkdir(exist_ok=True)
    orphan.write_bytes(b"renamed but never committed")
    with Vault.open(vault_path, TEST_PASSPHRASE) as v:
        assert not orphan.exists()
        assert not list((vault_path / "tmp").iterdir())
        assert _read(v, pid, blob_id) == data
