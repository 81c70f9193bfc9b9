"""A real `mindward serve` for the remote tests: a subprocess on a free loopback port, over a
served twin of a lab vault, plus a byte-counting proxy that can kill it mid-answer.

The lab: a steward, an analyst (omar) and an auditor (ines); a cohort with consent forms, one
recording (pyedflib's test_generator.edf, an independent writer's file) and explicit ratings.
`local` is a copy where everyone holds a passphrase; `served` a copy converted for the service
(the same participants, keys and signing key), where omar and ines hold only tokens."""

from __future__ import annotations

import contextlib
import json
import os
import select
import shutil
import signal
import socket
import subprocess
import sys
import threading
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from tests.conftest import ROOT, TEST_PASSPHRASE

EXAMPLES = ROOT / "docs" / "examples"
ANALYST = "analyst passphrase long enough"
AUDITOR = "auditor passphrase long enough"
SERVICE_PASSPHRASE = "the service's own passphrase, long"
PASSPHRASES = {"steward": TEST_PASSPHRASE, "omar": ANALYST, "ines": AUDITOR}
COHORT = 22
START_GUARD_S = 180  # only against a hang: a service that never starts fails the fixture


def form(code: str, name: str = "consent-all-granted.toml") -> str:
    return (EXAMPLES / name).read_text().replace('code = "TL-', f'code = "{code}-', 1)


def build_lab(root: Path) -> dict[str, str]:
    import pyedflib.data

    from vault import Vault

    edf = Path(pyedflib.data.__file__).parent / "test_generator.edf"
    with Vault.init(root / "base", TEST_PASSPHRASE) as v:
        pids = [v.enrol(form(f"m{i}").encode())["participant_id"] for i in range(COHORT)]
        v.add_member("omar", "analyst", ANALYST)
        v.add_member("ines", "auditor", AUDITOR)
        (root / "ratings.csv").write_text("participant_id,item_id,value\n" + "".join(
            f"{p},dish-{j:02d},{(i + j) % 4}\n" for i, p in enumerate(pids) for j in range(4)))
        v.ingest_scores(root / "ratings.csv", "explicit")
        v.ingest_eeg(pids[0], edf)
    (root / "form.toml").write_text(form("new"))
    (root / "amend.toml").write_text((EXAMPLES / "amend-withdraw-recommender.toml").read_text()
                                     .replace('code = "TL-', 'code = "m1-', 1))
    (root / "items.txt").write_text("".join(f"dish-{j:02d}\n" for j in range(4)))
    return {"root": str(root), "pid": pids[0], "pid1": pids[1], "pid2": pids[2], "edf": str(edf)}


def make_served_twin(base: Path, twin: Path) -> dict[str, str]:
    """A copy of `base` converted for the service; returns each member's token."""
    from vault import Vault

    shutil.copytree(base, twin)
    with Vault.open(twin, TEST_PASSPHRASE) as v:
        v.make_served(SERVICE_PASSPHRASE)
        return {"steward": v.issue_token("steward")["token"],
                "omar": v.add_member("omar", "analyst")["token"],
                "ines": v.add_member("ines", "auditor")["token"]}


@dataclass
class Service:
    """A running `mindward serve`: its process, the URL its start line gave, its stderr file."""

    proc: subprocess.Popen
    url: str
    log: Path

    def stop(self) -> None:
        """SIGTERM (as a service manager stops it), then the pipe closed."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            self.proc.wait(timeout=START_GUARD_S)
        self.proc.stdout.close()


def start_server(vault_dir: Path, *extra: str) -> Service:
    """`mindward serve` on a free loopback port with no scheduled sweep (as tests/server/conftest.py
    launches it, but stderr into a file beside the vault: no pipe left for a thread to drain)."""
    log = vault_dir.parent / f"{vault_dir.name}.serve.log"
    env = {k: v for k, v in os.environ.items() if not k.startswith("MINDWARD_")}
    env["MINDWARD_PASSPHRASE"] = SERVICE_PASSPHRASE
    with log.open("wb") as errors:
        proc = subprocess.Popen(
            [sys.executable, "-m", "vault", "serve", "--vault", str(vault_dir), "--port", "0", "--json",
             "--sweep-every-hours", "0", *extra], stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
            stderr=errors, env=env)
    ready, _, _ = select.select([proc.stdout], [], [], START_GUARD_S)
    line = proc.stdout.readline() if ready else b""
    if not line:
        proc.kill()
        proc.wait()
        proc.stdout.close()
        raise AssertionError(f"mindward serve did not start: {log.read_text()[-2000:]}")
    return Service(proc, json.loads(line)["url"], log)


def kill(server: Service) -> None:
    if server.proc.poll() is None:
        os.kill(server.proc.pid, signal.SIGKILL)
        server.proc.wait()


@pytest.fixture(scope="session")
def lab_files(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """The lab vault (`base`) and its input files, built once for every remote test."""
    return build_lab(tmp_path_factory.mktemp("remote-lab"))


@pytest.fixture(scope="module")
def lab(lab_files: dict, tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict]:
    """The twins of the lab vault (`local`, `served`) and a service running over `served`."""
    root = tmp_path_factory.mktemp("twins")
    base = Path(lab_files["root"]) / "base"
    shutil.copytree(base, root / "local")
    facts: dict = {**lab_files, "twins": str(root), "tokens": make_served_twin(base, root / "served")}
    server = start_server(root / "served")
    facts["server"] = server
    try:
        yield facts
    finally:
        server.stop()


class KillingProxy:
    """Forwards one loopback port to the service. In the answer to a download of an export
    archive: once `after` bytes went through, SIGKILLs the service and cuts the connection; with
    `flip_after`, changes the byte that follows the first occurrence of those bytes. In a
    recording's upload: once `upload_after` bytes of it went through, SIGKILLs the service."""

    def __init__(self, target_url: str, server: Service, after: int | None,
                 flip_after: bytes | None = None, upload_after: int | None = None) -> None:
        host_port = target_url.split("://", 1)[1].split("/", 1)[0]
        self._target = (host_port.rsplit(":", 1)[0], int(host_port.rsplit(":", 1)[1]))
        self._server, self._after, self._flip = server, after, flip_after
        self.flipped = False
        self._upload_after = upload_after
        self._listener = socket.create_server(("127.0.0.1", 0))
        self.url = f"http://127.0.0.1:{self._listener.getsockname()[1]}"
        self.killed_after: int | None = None
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while True:
            try:
                client, _ = self._listener.accept()
            except OSError:
                return
            upstream = socket.create_connection(self._target)
            state = {"downloading": False, "sent": 0}
            threading.Thread(target=self._up, args=(client, upstream, state), daemon=True).start()
            threading.Thread(target=self._down, args=(upstream, client, state), daemon=True).start()

    def _up(self, client: socket.socket, upstream: socket.socket, state: dict) -> None:
        for data in _reads(client):
            if b"GET /v1/exports/" in data:
                state["downloading"] = True
            if b"POST /v1/ingest/eeg/" in data:
                state["uploading"], state["up"] = True, 0
            if state.get("uploading") and self._upload_after is not None:
                state["up"] += len(data)
                if state["up"] > self._upload_after:
                    upstream.sendall(data[: len(data) - (state["up"] - self._upload_after)])
                    self.killed_after = self._upload_after  # before the kill: the client may
                    kill(self._server)  # see the cut and the test look here before kill returns
                    break
            upstream.sendall(data)
        _close(upstream)
        _close(client)

    def _down(self, upstream: socket.socket, client: socket.socket, state: dict) -> None:
        for data in _reads(upstream):
            if state["downloading"] and self._flip is not None and not self.flipped:
                data = self._flipped(data)
            if state["downloading"] and self._after is not None and state["sent"] + len(data) > self._after:
                client.sendall(data[: max(0, self._after - state["sent"])])
                self.killed_after = self._after  # before the kill (see _up)
                kill(self._server)
                break
            client.sendall(data)
            if state["downloading"]:
                state["sent"] += len(data)
        _close(client)
        _close(upstream)

    def _flipped(self, data: bytes) -> bytes:
        at = data.find(self._flip)
        if at < 0 or at + len(self._flip) >= len(data):
            return data
        self.flipped = True
        i = at + len(self._flip)
        return data[:i] + bytes([data[i] ^ 0x20]) + data[i + 1:]

    def close(self) -> None:
        _close(self._listener)


def _reads(sock: socket.socket) -> Iterator[bytes]:
    while True:
        try:
            data = sock.recv(65536)
        except OSError:
            return
        if not data:
            return
        yield data


def _close(sock: socket.socket) -> None:
    with contextlib.suppress(OSError):
        sock.shutdown(socket.SHUT_RDWR)
    sock.close()
