"""`pip install .` then `mindward demo` (the README's first command) needs no extra: the demo runs
in a fresh interpreter where pandas, scipy, sqlite-utils and OpenDP (test and bench extras only)
cannot be imported."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

BLOCKED = ("pandas", "scipy", "sqlite_utils", "opendp", "mindward_bench")
_RUN = """
import importlib.abc, sys
BLOCKED = set(sys.argv.pop(1).split(","))

class Blocked(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in BLOCKED:
            raise ModuleNotFoundError(f"blocked for this test: {name}", name=name)
        return None

sys.meta_path.insert(0, Blocked())
from vault.cli.app import main
sys.exit(main(sys.argv[1:]))
"""


def _run(*args: str, blocked: tuple[str, ...] = BLOCKED) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-c", _RUN, ",".join(blocked), *args],
                          capture_output=True, text=True, timeout=900)


def test_the_blocker_blocks() -> None:
    """Guard against a vacuous test: with the blocker, the bench (which needs pandas) is refused
    with the install hint, exit 2."""
    done = _run("bench", "--quick", blocked=("pandas",))
    assert done.returncode == 2 and "(pandas is missing)" in done.stderr
    assert "mindward[bench]" in done.stderr


@pytest.mark.slow
def test_demo_runs_without_the_test_and_bench_extras(tmp_path: Path) -> None:
    done = _run("demo", "--dir", str(tmp_path / "demo"), "--json")
    assert done.returncode == 0, done.stderr[-2000:]
    summary = json.loads(done.stdout)
    assert summary["audit_ok"] and summary["receipt_verifies"] and summary["identity_leaks"] == 0
    assert Path(summary["paths"]["plot"]).stat().st_size > 0  # the utility plot (matplotlib) too
