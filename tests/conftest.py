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
