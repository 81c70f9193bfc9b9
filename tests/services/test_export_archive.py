"""A finished export handed over as a tar stream: packed, carried in chunks, unpacked, it still
verifies against the vault's public key; a byte changed on the way is caught by the manifest.
(GNU tar also lists the archive: tests/formats/test_archive.py.)"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import pytest

from tests.clock import at
from tests.services.test_ingest import NOW, PYEDFLIB_DATA, _form
from tests.services.test_ingest_stream import Upload
from vault import Vault, verify_export
from vault.formats.archive import pack, unpack

LIMITS = {"max_bytes": 1 << 30, "max_files": 10_000}


@pytest.fixture
def exported(fresh_vault: Vault, tmp_path: Path) -> tuple[Vault, Path]:
    data = (PYEDFLIB_DATA / "test_generator.edf").read_bytes()
    for i in range(5):
        pid = at(fresh_vault, NOW).enrol(_form("consent-all-granted.toml", f"a{i}"))["participant_id"]
        at(fresh_vault, NOW).ingest_eeg_stream(pid, Upload(data, seed=i), len(data))  # uploads
    out = tmp_path / "export"
    at(fresh_vault, NOW).export_eeg("primary-analysis", out)
    assert verify_export(out, fresh_vault.public_key)["ok"]
    return fresh_vault, out


def _carried(data: bytes, size: int = 8192) -> list[bytes]:
    return [data[i : i + size] for i in range(0, len(data), size)]


def test_a_packed_export_unpacks_and_verifies(exported, tmp_path: Path) -> None:
    v, out = exported
    dest = tmp_path / "arrived"
    dest.mkdir()
    result = unpack(_carried(b"".join(pack(out))), dest, **LIMITS)
    assert result["files"] == sum(1 for p in out.rglob("*") if p.is_file())
    checked = verify_export(dest, v.public_key)
    assert checked["ok"], checked["problems"]
    if shutil.which("tar"):
        gnu = tmp_path / "gnu"
        gnu.mkdir()
        subprocess.run(["tar", "-xf", "-", "-C", str(gnu)], input=b"".join(pack(out)), check=True)
        assert verify_export(gnu, v.public_key)["ok"]  # what GNU tar unpacks verifies too


def test_a_byte_changed_in_transit_is_caught_by_the_manifest(exported, tmp_path: Path) -> None:
    v, out = exported
    data = bytearray(b"".join(pack(out)))
    edf = next(out.rglob("*_eeg.edf"))
    at_byte = data.find(edf.read_bytes()[-4096:])  # inside the recording's content
    assert at_byte > 0
    data[at_byte + 100] ^= 0x20
    dest = tmp_path / "arrived"
    dest.mkdir()
    unpack(_carried(bytes(data)), dest, **LIMITS)  # a well-formed archive: tar cannot tell
    checked = verify_export(dest, v.public_key)
    assert not checked["ok"] and any("altered" in p for p in checked["problems"])


def test_a_file_left_out_in_transit_is_caught(exported, tmp_path: Path) -> None:
    v, out = exported
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    victim = next(copy.rglob("*_eeg.edf"))
    victim.unlink()
    dest = tmp_path / "arrived"
    dest.mkdir()
    unpack(pack(copy), dest, **LIMITS)
    checked = verify_export(dest, v.public_key)
    assert not checked["ok"]
    assert json.loads((dest / "manifest.json").read_text()) == json.loads((out / "manifest.json").read_text())
