"""Shared fixtures.

Published vectors live outside the project, in ../shared/vectors (see its
README). Where that folder is absent (a user's clone) the tests that need it
skip with a reason; under CI (CI=true) a missing folder is a failure instead.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
SHARED_VECTORS = Path(os.environ.get("MINDWARD_SHARED_VECTORS", ROOT.parent / "shared" / "vectors"))
# Fast Argon2id is never used: every test vault pays the real RFC 9106 cost.
TEST_PASSPHRASE = "correct horse battery staple"


def shared_vectors_dir(*parts: str) -> Path:
    """Path inside ../shared/vectors, or skip (fail under CI) when it is absent."""
    path = SHARED_VECTORS.joinpath(*parts)
    if not path.exists():
        reason = f"published vectors not found at {path} (../shared/vectors is not in this clone)"
        if os.environ.get("CI"):
            pytest.fail(reason + "; CI must run them")
        pytest.skip(reason)
    return path


@pytest.fixture
def vectors() -> Path:
    return shared_vectors_dir()


@pytest.fixture
def vault_path(tmp_path: Path) -> Path:
    return tmp_path / "vault"


@pytest.fixture
def fresh_vault(vault_path: Path):
    from vault import Vault

    v = Vault.init(vault_path, TEST_PASSPHRASE)
    yield v
    v.close()


def files_of(root: Path) -> list[Path]:
    """Every regular file below `root` (DB, WAL, SHM, blobs, temp)."""
    return [p for p in root.rglob("*") if p.is_file()]


def assert_absent(root: Path, *needles: bytes) -> None:
    """No file below `root` contains any of `needles`."""
    for path in files_of(root):
        data = path.read_bytes()
        for needle in needles:
            assert needle not in data, f"{needle[:16]!r}... found in {path.relative_to(root)}"
