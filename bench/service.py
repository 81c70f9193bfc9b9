"""The service against the same use cases called in-process, measured in the same run.

A throw-away vault is made for the bench (a cohort enrolled from invented consent forms, a few
invented EEG recordings ingested), converted for serving, copied (a vault is locked while open),
and measured both ways, the runs of each side alternating so that neither gets a quieter machine:

- in-process: the steward's open vault (the copy), one thread: `Vault.access_summary` for the
  cohort, and `Vault.export_eeg` (bytes of the finished dataset per second);
- through `mindward serve` started as a subprocess on a loopback port: the same access check from
  16 concurrent clients (threads, httpx, keep-alive) with the steward's token, and the same export
  as the remote client receives it (POST the export, download its archive, unpack, verify with the
  vault's public key).

The targets are ratios of the two (service / in-process), each side's fastest run. The service
makes every vault call on one thread (the vault's SQLite connection belongs to it), so its
access-check rate is bounded by that thread: token check (a keyed tag and an audited entry) plus
the check itself, one call at a time. `vault_thread_per_s` measures that ceiling in-process (with
the reply's JSON encoding). Nothing here is participant data; the vault lives in the system's
temporary directory and is deleted afterwards.
"""

from __future__ import annotations

import json
import os
import queue
import shutil
import signal
import statistics
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from vault.api import Vault

_PASSPHRASE = "benchmark passphrase, not a secret"  # noqa: S105 (throw-away vault)
PURPOSE = "primary-analysis"
CATEGORIES = ["eeg-raw"]
START_GUARD_S = 120.0  # a liveness guard for a service that never starts, not a speed check
_FORM = """form_version = "NSL-2026-DISH/1"
signed = 2026-03-02
expires = 2031-03-02
[participant]
code = "SB-{n:05d}"
[purposes.primary-analysis]
granted = [{granted}]
explicit = true
"""
_ALL = '"eeg-raw", "scores-derived", "ratings-explicit", "demographics"'
_NO_EEG = '"ratings-explicit"'


def _timed(fn: Callable[[], Any]) -> tuple[float, Any]:
    start = time.perf_counter()
    result = fn()
    return time.perf_counter() - start, result


def _quantile(values: list[float], q: float) -> float:
    """Nearest-rank quantile (common practice), in milliseconds."""
    ordered = sorted(values)
    return 1000 * ordered[min(len(ordered) - 1, max(0, round(q * len(ordered)) - 1))]


# -- the vault ------------------------------------------------------------------------------------


def build_vault(root: Path, *, participants: int, recordings: int, record_s: int) -> dict[str, Any]:
    """A served vault: `participants` enrolled (one in ten without EEG consent, so the check has
    someone to leave out), `recordings` of them with an invented 64-channel EDF+ of `record_s` s.
    Returns the vault's path, the steward's token and the vault's public key."""
    from mindward_bench.edf import write_test_edf

    edf = root / "service-bench.edf"
    write_test_edf(edf, duration_s=record_s, n_channels=64, rate=1000)
    with Vault.init(root / "vault", _PASSPHRASE) as v:
        pids = [v.enrol(_FORM.format(n=i, granted=_NO_EEG if i % 10 == 9 else _ALL).encode())
                ["participant_id"] for i in range(participants)]
        for pid in [p for i, p in enumerate(pids) if i % 10 != 9][:recordings]:
            v.ingest_eeg(pid, edf)
        v.make_served(_PASSPHRASE)
        token = v.issue_token(v.member)["token"]
        public_key = v.public_key
    edf.unlink()
    return {"vault": root / "vault", "token": token, "public_key": public_key}


def _dataset_bytes(folder: Path) -> int:
    return sum(f.stat().st_size for f in folder.rglob("*") if f.is_file())


# -- in-process -----------------------------------------------------------------------------------


class Local:
    """The steward's open vault (a copy of the served one), one thread: the same use cases."""

    def __init__(self, vault_path: Path, token: str, root: Path) -> None:
        self.vault = Vault.open(vault_path, _PASSPHRASE)
        self.token = token
        self.root = root
        self.first = self.vault.access_summary(PURPOSE, CATEGORIES)  # warm

    def access_per_s(self, checks: int) -> float:
        seconds, _ = _timed(lambda: [self.vault.access_summary(PURPOSE, CATEGORIES)
                                     for _ in range(checks)])
        return checks / seconds

    def vault_thread_per_s(self, checks: int) -> float:
        """What the service's vault thread does per call (token check, access check, the reply
        encoded), one call after another: the ceiling of the service's rate."""
        from vault.server.replies import document

        def as_service() -> None:
            view = self.vault.authenticate(self.token, client="127.0.0.1", operation="access.check")
            document(view.access_summary(PURPOSE, CATEGORIES))

        seconds, _ = _timed(lambda: [as_service() for _ in range(checks)])
        return checks / seconds

    def export(self, i: int) -> tuple[float, Path]:
        out = self.root / f"local-export-{i}"
        seconds, _ = _timed(lambda: self.vault.export_eeg(PURPOSE, out))
        return seconds, out

    def handover(self, out: Path) -> dict[str, float]:
        """What the service adds to an export besides HTTP, without it: pack and unpack the
        finished folder in one process, then verify it."""
        import vault
        from vault.formats.archive import pack, unpack

        dest = self.root / "local-unpacked"
        dest.mkdir(mode=0o700)
        t_pack, _ = _timed(lambda: unpack(pack(out), dest, max_bytes=1 << 40, max_files=1_000_000))
        t_verify, report = _timed(lambda: vault.verify_export(dest, self.vault.public_key))
        if not report["ok"]:
            raise RuntimeError(f"the bench's export does not verify: {report['problems']}")
        shutil.rmtree(dest)
        return {"pack_unpack": t_pack, "verify": t_verify}

    def close(self) -> None:
        self.vault.close()


# -- the service ----------------------------------------------------------------------------------


class Served:
    """`mindward serve` on a free loopback port (port 0; the JSON start line says which)."""

    def __init__(self, vault_path: Path) -> None:
        env = {k: v for k, v in os.environ.items() if not k.startswith("MINDWARD_")}
        env["MINDWARD_PASSPHRASE"] = _PASSPHRASE
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "vault", "serve", "--vault", str(vault_path), "--port", "0",
             "--json"], stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
            env=env)
        lines: queue.Queue[bytes] = queue.Queue()
        threading.Thread(target=lambda: lines.put(self.proc.stdout.readline()), daemon=True).start()
        try:
            line = lines.get(timeout=START_GUARD_S)
        except queue.Empty:
            self.stop()
            raise RuntimeError("mindward serve did not start") from None
        if not line:
            self.proc.wait()
            said = self.proc.stderr.read().decode(errors="replace").strip()[-500:]
            self.stop()
            raise RuntimeError(f"mindward serve exited {self.proc.returncode}: {said}")
        facts = json.loads(line)
        if "url" not in facts:
            self.stop()
            raise RuntimeError(f"mindward serve did not start: {facts.get('error', facts)}")
        self.origin = facts["url"].removesuffix("/v1")
        threading.Thread(target=self.proc.stderr.read, daemon=True).start()  # drained, never blocks

    def stop(self) -> None:
        """SIGTERM, as a service manager stops it (the vault closes and signs a head)."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=START_GUARD_S)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        for pipe in (self.proc.stdout, self.proc.stderr):
            pipe.close()


def _client(origin: str, token: str) -> Any:
    import httpx

    return httpx.Client(base_url=origin, headers={"Authorization": f"Bearer {token}"},
                        timeout=600)


class Clients:
    """`clients` threads, each with its own keep-alive connection, sending access checks; every
    reply must hold the in-process document's cohort."""

    def __init__(self, origin: str, token: str, *, clients: int, included: int) -> None:
        self.sessions = [_client(origin, token) for _ in range(clients)]
        self.included = included
        self.latencies: list[float] = []
        for session in self.sessions:
            self._check(session)  # connect and warm

    def _check(self, session: Any) -> float:
        start = time.perf_counter()
        reply = session.post("/v1/access/check", json={"purpose": PURPOSE, "categories": CATEGORIES})
        seconds = time.perf_counter() - start
        if reply.status_code != 200 or reply.json()["included"] != self.included:
            raise RuntimeError(f"access check through the service: HTTP {reply.status_code}")
        return seconds

    def access_per_s(self, checks: int) -> float:
        """`checks` calls from every client at once; the calls answered per second."""
        errors: list[str] = []
        left = iter(range(checks))
        lock = threading.Lock()
        go = threading.Barrier(len(self.sessions) + 1)
        answered: list[float] = []

        def worker(session: Any) -> None:
            go.wait()
            try:
                while True:
                    with lock:
                        if errors or next(left, None) is None:
                            return
                    seconds = self._check(session)
                    with lock:
                        answered.append(seconds)
            except Exception as exc:  # reported below: the run must not count a failed call
                errors.append(str(exc))

        threads = [threading.Thread(target=worker, args=(s,)) for s in self.sessions]
        for thread in threads:
            thread.start()
        go.wait()
        start = time.perf_counter()
        for thread in threads:
            thread.join()
        wall = time.perf_counter() - start
        if errors:
            raise RuntimeError(f"{len(errors)} service calls failed: {errors[0]}")
        self.latencies += answered
        return len(answered) / wall

    def close(self) -> None:
        for session in self.sessions:
            session.close()


def service_export(origin: str, token: str, public_key: bytes, root: Path,
                   i: int) -> dict[str, float]:
    """One export as the remote client receives it, the folder verified: its seconds, and
    those of its parts (the export call, receiving and unpacking the archive, verifying)."""
    import vault
    from vault.formats.archive import unpack

    dest = root / f"remote-export-{i}"
    dest.mkdir(mode=0o700)
    with _client(origin, token) as session:
        start = time.perf_counter()
        made = session.post("/v1/exports/eeg", json={"purpose": PURPOSE, "recipient": None,
                                                     "demographics": False})
        if made.status_code != 200:
            raise RuntimeError(f"export through the service: HTTP {made.status_code} {made.text[:300]}")
        result = made.json()
        exported = time.perf_counter()
        with session.stream("GET", result["archive"]) as archive:
            if archive.status_code != 200:
                raise RuntimeError(f"export archive: HTTP {archive.status_code}")
            unpack(archive.iter_bytes(), dest, max_bytes=1 << 40, max_files=1_000_000)
        received = time.perf_counter()
        report = vault.verify_export(dest, public_key)
        done = time.perf_counter()
    if not report["ok"] or report.get("export_id") != result["export_id"]:
        raise RuntimeError(f"the export from the service does not verify: {report.get('problems')}")
    shutil.rmtree(dest)
    return {"s": done - start, "export_call_s": exported - start, "receive_s": received - exported,
            "verify_s": done - received}


# -- the run ----------------------------------------------------------------------------------------


def bench_service(workdir: Path, *, participants: int = 1000, recordings: int = 8,
                  record_s: int = 60, clients: int = 16, local_checks: int = 20,
                  service_checks: int = 128, rounds: int = 3, exports: int = 3) -> dict[str, Any]:
    """The figures of the service benchmark (see the module's docstring). In-process and service
    runs alternate (`rounds` of access checks, `exports` exports each), on two copies of one
    vault, so that neither side gets a quieter machine; each side's fastest run counts."""
    root = workdir / "service"
    root.mkdir()
    began = time.perf_counter()
    try:
        built = build_vault(root, participants=participants, recordings=recordings, record_s=record_s)
        shutil.copytree(built["vault"], root / "twin")  # the vault is locked while served
        local = Local(root / "twin", built["token"], root)
        try:
            served = Served(built["vault"])
            try:
                remote = Clients(served.origin, built["token"], clients=clients,
                                 included=local.first["included"])
                try:
                    local_rates, thread_rates, remote_rates = [], [], []
                    for _ in range(rounds):
                        local_rates.append(local.access_per_s(local_checks))
                        thread_rates.append(local.vault_thread_per_s(local_checks))
                        remote_rates.append(remote.access_per_s(service_checks))
                finally:
                    remote.close()
                local_exports, remote_exports = [], []
                for i in range(exports):
                    seconds, out = local.export(i)
                    local_exports.append(seconds)
                    size = _dataset_bytes(out)
                    handover = local.handover(out) if i == exports - 1 else {}
                    shutil.rmtree(out)
                    remote_exports.append(service_export(served.origin, built["token"],
                                                         built["public_key"], root, i))
            finally:
                served.stop()
        finally:
            local.close()
    finally:
        shutil.rmtree(root, ignore_errors=True)
    remote_export_s = [run["s"] for run in remote_exports]
    fastest = min(remote_exports, key=lambda run: run["s"])
    local_rate, remote_rate = size / min(local_exports), size / fastest["s"]
    latencies = remote.latencies
    return {
        "service_participants": participants, "service_included": local.first["included"],
        "service_clients": clients, "service_calls": len(latencies), "service_rounds": rounds,
        "inprocess_access_per_s": max(local_rates), "vault_thread_per_s": max(thread_rates),
        "service_access_per_s": max(remote_rates),
        "service_access_vs_inprocess": max(remote_rates) / max(local_rates),
        "inprocess_access_runs_per_s": local_rates, "service_access_runs_per_s": remote_rates,
        "service_access_p50_ms": _quantile(latencies, 0.5),
        "service_access_p99_ms": _quantile(latencies, 0.99),
        "service_dataset_mib": size / (1 << 20), "service_recordings": recordings,
        "inprocess_export_mib_s": local_rate / (1 << 20), "service_export_mib_s": remote_rate / (1 << 20),
        "service_export_vs_inprocess": remote_rate / local_rate,
        "inprocess_export_runs_s": local_exports, "service_export_runs_s": remote_export_s,
        "service_export_p50_ms": 1000 * statistics.median(remote_export_s),
        "service_export_max_ms": 1000 * max(remote_export_s),
        "service_export_parts_s": {"export_call": fastest["export_call_s"],
                                   "receive_unpack": fastest["receive_s"], "verify": fastest["verify_s"]},
        "inprocess_handover_s": handover, "service_bench_s": time.perf_counter() - began,
    }


def format_lines(figures: dict[str, Any]) -> Iterator[str]:
    yield ("  service: access check for {service_participants} participants ({service_included} "
           "included): in-process {inprocess_access_per_s:.1f}/s, through the service with "
           "{service_clients} clients {service_access_per_s:.1f}/s (p50 {service_access_p50_ms:.0f} ms, "
           "p99 {service_access_p99_ms:.0f} ms over {service_calls} calls; the vault thread's ceiling "
           "{vault_thread_per_s:.1f}/s)".format(**figures))
    yield ("  service: EEG export of {service_recordings} recordings ({service_dataset_mib:.0f} MiB): "
           "in-process {inprocess_export_mib_s:.0f} MiB/s, received and verified through the service "
           "{service_export_mib_s:.0f} MiB/s (p50 {service_export_p50_ms:.0f} ms, max "
           "{service_export_max_ms:.0f} ms); this benchmark took {service_bench_s:.0f} s".format(**figures))
    parts, handover = figures["service_export_parts_s"], figures["inprocess_handover_s"]
    yield (f"    fastest service export: export call {parts['export_call']:.2f} s, archive received and "
           f"unpacked {parts['receive_unpack']:.2f} s, verified {parts['verify']:.2f} s; in-process "
           f"export {min(figures['inprocess_export_runs_s']):.2f} s, pack + unpack without HTTP "
           f"{handover['pack_unpack']:.2f} s, verify {handover['verify']:.2f} s")
