"""Start-up time: `mindward --version` against a bare `python -c "import typer"`, same run.

Each figure is the median wall time of several fresh interpreters, the two commands
interleaved so that load from the other processes on the machine falls on both alike.
Also reports which heavy modules a bare `import vault` and the CLI module load (none
should: they cost about 0.6 s before the first line of any command runs).
"""

from __future__ import annotations

import json
import os
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

HEAVY = ("pandas", "scipy", "matplotlib", "sqlite_utils", "pyarrow", "edfio", "opendp")
_PROBE = ("import json, sys; import vault, vault.cli.app; "
          f"print(json.dumps(sorted(m for m in {HEAVY!r} if m in sys.modules)))")


def _mindward() -> list[str]:
    """The installed console script beside this interpreter, else `python -m vault`."""
    script = Path(sys.executable).with_name("mindward")
    if script.is_file() and os.access(script, os.X_OK):
        return [str(script)]
    found = shutil.which("mindward")
    return [found] if found else [sys.executable, "-m", "vault"]


def _env() -> dict[str, str]:
    """This environment, but bytecode caches allowed: pip compiles an installed package at
    install time, so a source checkout run with PYTHONDONTWRITEBYTECODE=1 would otherwise
    recompile every module on every start (about 60 ms here) while typer does not."""
    return {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}


def _wall(argv: list[str]) -> float:
    start = time.perf_counter()
    subprocess.run(argv, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=_env())
    return time.perf_counter() - start


def bench_startup(*, runs: int = 9) -> dict[str, Any]:
    version = [*_mindward(), "--version"]
    helps = [*_mindward(), "--help"]
    typer = [sys.executable, "-c", "import typer"]
    for argv in (version, helps, typer):  # warm the caches (files, bytecode) once; not counted
        _wall(argv)
    times: dict[str, list[float]] = {"version": [], "help": [], "typer": []}
    for _ in range(runs):
        times["typer"].append(_wall(typer))
        times["version"].append(_wall(version))
        times["help"].append(_wall(helps))
    median = {k: statistics.median(v) for k, v in times.items()}
    probe = subprocess.run([sys.executable, "-c", _PROBE], check=True, capture_output=True, text=True)
    return {
        "startup_runs": runs,
        "startup_version_s": median["version"], "startup_help_s": median["help"],
        "startup_typer_s": median["typer"],
        "startup_vs_typer": median["version"] / median["typer"],
        "startup_heavy_modules": json.loads(probe.stdout),
        "startup_command": " ".join([Path(version[0]).name, *version[1:]]),
    }
