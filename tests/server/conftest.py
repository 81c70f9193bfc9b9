"""A real service for the tests: `mindward serve` started as a subprocess on a free loopback port
(port 0; the start line says which), driven over HTTP with httpx.

Failed authentications are throttled per client address, so the tests that present many bad tokens
send each from its own loopback source address (127.0.0.x all reach the loopback interface on Linux:
common practice)."""

from __future__ import annotations

import datetime as dt
import json
import os
import queue
import signal
import subprocess
import sys
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.clock import ManualClock
from tests.conftest import ROOT, TEST_PASSPHRASE

EXAMPLES = ROOT / "docs" / "examples"
COHORT = 22
START_GUARD_S = 180  # a liveness guard for a server that never starts, not a speed check


def form(code: str, name: str = "consent-all-granted.toml") -> str:
    return (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1)


def edf_file() -> Path:
    import pyedflib.data

    return Path(pyedflib.data.__file__).parent / "test_generator.edf"


@dataclass
class Running:
    proc: subprocess.Popen[bytes]
    start: dict[str, Any]
    vault: Path
    stderr: list[bytes] = field(default_factory=list)

    @property
    def url(self) -> str:
        return self.start["url"]

    @property
    def origin(self) -> str:
        return self.url.removesuffix("/v1")

    def client(self, token: str | None = None, *, source: str | None = None,
               verify: Any = True) -> httpx.Client:
        headers = {"Authorization": f"Bearer {token}"} if token is not None else {}
        transport = httpx.HTTPTransport(local_address=source, verify=verify) if source else None
        return httpx.Client(base_url=self.origin, headers=headers, transport=transport, verify=verify,
                            timeout=600)

    def stop(self) -> int:
        """SIGTERM, as a service manager stops it; the exit code."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(timeout=START_GUARD_S)


def launch(vault_path: Path, *extra: str, passphrase: str | None = TEST_PASSPHRASE,
           env: dict[str, str] | None = None) -> subprocess.Popen[bytes]:
    environment = {k: v for k, v in os.environ.items() if not k.startswith("MINDWARD_")}
    if passphrase is not None:
        environment["MINDWARD_PASSPHRASE"] = passphrase
    environment.update(env or {})
    return subprocess.Popen(
        [sys.executable, "-m", "vault", "serve", "--vault", str(vault_path), "--port", "0", "--json",
         *extra], stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        env=environment)


def start(vault_path: Path, *extra: str, **kw: Any) -> Running:
    proc = launch(vault_path, *extra, **kw)
    lines: queue.Queue[bytes] = queue.Queue()
    threading.Thread(target=lambda: lines.put(proc.stdout.readline()), daemon=True).start()
    try:
        line = lines.get(timeout=START_GUARD_S)
    except queue.Empty:
        proc.kill()
        raise AssertionError("the service did not start") from None
    if not line:
        proc.wait()
        raise AssertionError(f"the service exited {proc.returncode}: {proc.stderr.read().decode()}")
    running = Running(proc, json.loads(line), vault_path)
    threading.Thread(target=lambda: running.stderr.extend(proc.stderr), daemon=True).start()
    return running


@pytest.fixture
def serve() -> Iterator[Any]:
    """Start services; each is stopped (SIGTERM) at the end of the test."""
    started: list[Running] = []

    def go(vault_path: Path, *extra: str, **kw: Any) -> Running:
        running = start(vault_path, *extra, **kw)
        started.append(running)
        return running

    yield go
    for running in started:
        if running.proc.poll() is None:
            running.proc.kill()
        running.proc.wait()
        running.proc.stdout.close()
        running.proc.stderr.close()


@dataclass(frozen=True)
class Lab:
    root: Path
    vault: Path
    tokens: dict[str, str]  # steward, analyst, auditor, expired, revoked
    pids: list[str]


def build_lab(root: Path) -> Lab:
    """A served vault with a cohort, a recording and ratings; tokens for each role, an expired
    token (issued by a clock set 40 days back, valid 30) and a revoked one."""
    from vault import Vault

    with Vault.init(root / "vault", TEST_PASSPHRASE) as v:
        pids = [v.enrol(form(f"m{i}").encode())["participant_id"] for i in range(COHORT)]
        (root / "ratings.csv").write_text("participant_id,item_id,value\n" + "".join(
            f"{p},dish-{j:02d},{(i + j) % 4}\n" for i, p in enumerate(pids) for j in range(4)))
        v.ingest_scores(root / "ratings.csv", "explicit")
        v.ingest_eeg(pids[0], edf_file())
        v.make_served(TEST_PASSPHRASE)
        tokens = {"steward": v.issue_token("steward")["token"],
                  "analyst": v.add_member("omar", "analyst")["token"],
                  "auditor": v.add_member("ines", "auditor")["token"],
                  "revoked": v.add_member("rita", "analyst")["token"]}
        v.revoke_tokens("rita")
    back = ManualClock(dt.datetime.now(dt.UTC) - dt.timedelta(days=40))
    with Vault.open(root / "vault", TEST_PASSPHRASE, clock=back) as v:
        tokens["expired"] = v.issue_token("omar", expires_days=30)["token"]
    return Lab(root, root / "vault", tokens, pids)


@pytest.fixture(scope="module")
def lab(tmp_path_factory: pytest.TempPathFactory) -> Lab:
    return build_lab(tmp_path_factory.mktemp("served"))


def error_of(response: httpx.Response) -> dict[str, Any]:
    """The error body, checked to be the documented shape: one line, no traceback."""
    body = response.json()
    assert set(body) == {"error", "exit_code", "hint", "param"}, body
    assert "\n" not in body["error"] and "Traceback" not in body["error"]
    return body
