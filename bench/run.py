"""`mindward bench`: the vault's speed and memory against limits measured in the same run.

Each figure is a ratio to a baseline this machine achieves in the same run
(raw AES-256-GCM to an fsynced file, a bare durable SQLite transaction, the same
rows inserted in one bare transaction, bare SHA-256 over the same Merkle hashes),
so the targets hold on any machine.
Nothing here is participant data: the bench writes random bytes to a
throw-away vault in the system's temporary directory and deletes it.
"""

from __future__ import annotations

import importlib.util
import json
import os
import shutil
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from vault import crypto
from vault.api import Vault
from vault.audit import log as audit
from vault.crypto import hazmat
from vault.storage import db as storage

# the [bench] extra: checked here, so that `mindward bench` without it says how to install it
# (the CLI maps this ImportError) instead of failing halfway through a run
for _name in ("edfio", "pandas", "opendp", "httpx"):
    if importlib.util.find_spec(_name) is None:
        raise ModuleNotFoundError(f"mindward bench needs {_name} (the [bench] extra)", name=_name)

MIB = 1 << 20
_PASSPHRASE = "benchmark passphrase, not a secret"  # noqa: S105 (throw-away vault)
_TARGETS = {
    "store_vs_raw": (">=", 0.6), "read_vs_raw": (">=", 0.6), "store_1gib_peak_mib": ("<", 100.0),
    "audit_single_vs_sqlite": (">=", 0.7), "audit_batch_vs_sqlite": (">=", 0.1),
    "audit_verify_vs_hashlib": ("<=", 5.0), "decisions_per_s": (">=", 100_000.0),
    "ingest_vs_read_aes": (">=", 0.5), "ingest_peak_mib": ("<", 200.0),
    "withdraw_1gib_vs_1mib": ("<=", 2.0), "receipt_verify_ms": ("<", 50.0),
    "export_matrix_vs_pandas": ("<=", 1.5), "sampler_vs_opendp": (">=", 10.0),
    "startup_vs_typer": ("<=", 1.5),
    "service_access_vs_inprocess": (">=", 0.5), "service_export_vs_inprocess": (">=", 0.7),
}

# the service benchmark (bench/service.py): the full run's cohort is the one issue 15 states
SERVICE_SIZES = {
    "full": {"participants": 1000, "recordings": 8, "record_s": 60, "clients": 16,
             "local_checks": 20, "service_checks": 128, "rounds": 3, "exports": 3},
    "quick": {"participants": 200, "recordings": 2, "record_s": 10, "clients": 16,
              "local_checks": 5, "service_checks": 32, "rounds": 2, "exports": 2},
}


def _timed(fn: Callable[[], Any]) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def _source(data: bytes, total: int) -> Iterator[bytes]:
    for _ in range(total // len(data)):
        yield data


# -- blobs ------------------------------------------------------------------------------------


def _raw_rates(workdir: Path, data: bytes, total: int) -> tuple[float, float]:
    aead = hazmat.RawAesGcm(crypto.new_key())
    nonce = crypto.random_bytes(12)
    path = workdir / "raw.bin"

    def write() -> None:
        with open(path, "wb", buffering=0) as out:
            for block in _source(data, total):
                out.write(aead.encrypt(nonce, block))
            os.fsync(out.fileno())

    def read() -> None:
        with open(path, "rb", buffering=0) as fh:
            while block := fh.read(len(data) + 16):
                aead.decrypt(nonce, block)

    t_write, t_read = _timed(write), _timed(read)
    path.unlink()
    return total / t_write / MIB, total / t_read / MIB


def _vault_rates(v: Vault, data: bytes, total: int) -> tuple[float, float]:
    pid = v.new_participant()
    holder: dict[str, str] = {}

    def store() -> None:
        holder["id"] = v.put_blob(pid, "bench", _source(data, total)).blob_id

    t_store = _timed(store)
    key = v._door._ring.participant_key(v._conn, pid)  # the bench measures the store, not the door

    def read() -> None:
        for _ in v._door._blobs._decrypt(key, pid, holder["id"]):
            pass

    return total / t_store / MIB, total / _timed(read) / MIB


def _rss_mib() -> float:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / MIB


def memory_child(path: str, total_mib: int) -> None:
    """Run in a subprocess: store a blob of `total_mib` MiB and print RSS growth as JSON."""
    v = Vault.open(Path(path), _PASSPHRASE)
    pid = v.new_participant()
    data = crypto.random_bytes(MIB)
    before = peak = _rss_mib()

    def sampled() -> Iterator[bytes]:
        nonlocal peak
        for i, block in enumerate(_source(data, total_mib * MIB)):
            if i % 8 == 0:
                peak = max(peak, _rss_mib())
            yield block

    v.put_blob(pid, "bench", sampled())
    peak = max(peak, _rss_mib())
    v.close()
    print(json.dumps({"before_mib": before, "peak_mib": peak}))


def _memory(path: Path, total_mib: int) -> dict[str, float]:
    code = f"from mindward_bench.run import memory_child; memory_child({str(path)!r}, {total_mib})"
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True)
    figures = json.loads(out.stdout)
    return {"store_peak_growth_mib": figures["peak_mib"] - figures["before_mib"],
            "store_blob_mib": total_mib}


# -- audit ------------------------------------------------------------------------------------


def _bare_sqlite_rate(workdir: Path, n: int) -> float:
    conn = sqlite3.connect(workdir / "bare.db", isolation_level=None)
    conn.execute("PRAGMA journal_mode = WAL")
    conn.execute("PRAGMA synchronous = FULL")
    conn.execute("CREATE TABLE t (seq INTEGER PRIMARY KEY, entry BLOB, leaf BLOB)")
    row = b"x" * 160

    def run() -> None:
        for i in range(n):
            conn.execute("BEGIN IMMEDIATE")
            conn.execute("INSERT INTO t VALUES (?, ?, ?)", (i, row, row[:32]))
            conn.execute("COMMIT")

    rate = n / _timed(run)
    conn.close()
    return rate


def _bare_batch_rate(workdir: Path, n: int) -> float:
    """`n` rows like audit rows (seq, 160-byte entry, 32-byte leaf) in one durable transaction."""
    conn = sqlite3.connect(workdir / "bare-batch.db", isolation_level=None)
    conn.execute("PRAGMA journal_mode = WAL")
    conn.execute("PRAGMA synchronous = FULL")
    conn.execute("DROP TABLE IF EXISTS t")
    conn.execute("CREATE TABLE t (seq INTEGER PRIMARY KEY, entry BLOB, leaf BLOB)")
    row = b"x" * 160

    def run() -> None:
        conn.execute("BEGIN IMMEDIATE")
        conn.executemany("INSERT INTO t VALUES (?, ?, ?)", ((i, row, row[:32]) for i in range(n)))
        conn.execute("COMMIT")

    rate = n / _timed(run)
    conn.close()
    return rate


def _audit_single_rate(v: Vault, n: int) -> float:
    """Durable single-entry transactions; each signs the current tree head (Ed25519)."""
    def run() -> None:
        for i in range(n):
            with storage.transaction(v._conn):
                v._audit.append({"actor": "bench", "action": "bench.single", "n": i},
                                "2026-01-01T00:00:00Z")

    return n / _timed(run)


def _fields(n: int, offset: int = 0) -> Iterator[dict[str, Any]]:
    for i in range(offset, offset + n):
        yield {"actor": "bench", "action": "bench.batch", "subjects": [f"p-{i:016x}"],
               "decision": "permit", "n": i}


def _audit_batch_rate(v: Vault, n: int) -> float:
    def run() -> None:
        with storage.transaction(v._conn):
            v._audit.append_many(_fields(n), "2026-01-01T00:00:00Z")

    return n / _timed(run)


def _verify_ratio(v: Vault, n: int) -> dict[str, float]:
    have = v._audit.size
    step = 200_000
    for start in range(have, n, step):
        with storage.transaction(v._conn):
            v._audit.append_many(_fields(min(step, n - start), start), "2026-01-01T00:00:00Z")
    v.sign_head()
    entries = [r[0] for r in v._conn.execute("SELECT entry FROM audit_log ORDER BY seq")]
    size = len(entries)

    def bare() -> None:
        leaves = [crypto.merkle_leaf_hash(e) for e in entries]
        while len(leaves) > 1:  # n - 1 node hashes, as the RFC 9162 tree needs
            paired = [crypto.merkle_node_hash(a, b) for a, b in zip(leaves[::2], leaves[1::2], strict=False)]
            leaves = paired + ([leaves[-1]] if len(leaves) % 2 else [])

    t_bare = _timed(bare)
    entries.clear()
    report: dict[str, audit.VerifyReport] = {}
    t_ours = _timed(lambda: report.setdefault("r", audit.verify_log(v._conn, v.public_key)))
    if not report["r"].ok:
        raise RuntimeError(f"bench log failed to verify: {report['r'].problem}")
    return {"audit_verify_entries": size, "audit_verify_s": t_ours, "hashlib_s": t_bare,
            "audit_verify_vs_hashlib": t_ours / t_bare}


# -- ingest ---------------------------------------------------------------------------------------

_BENCH_FORM = """form_version = "NSL-2026-DISH/1"
signed = 2026-03-02
expires = 2031-03-02
[participant]
code = "BENCH-001"
[purposes.primary-analysis]
granted = ["eeg-raw", "scores-derived", "ratings-explicit", "demographics"]
explicit = true
"""


def _bench_participant(v: Vault) -> str:
    return str(v.enrol(_BENCH_FORM.encode())["participant_id"])


def ingest_child(path: str, edf: str) -> None:
    """Run in a subprocess: ingest `edf` and print time and RSS growth as JSON."""
    v = Vault.open(Path(path), _PASSPHRASE)
    pid = _bench_participant(v)
    before = _rss_mib()
    peak = [before]
    import threading

    done = threading.Event()

    def sample() -> None:
        while not done.wait(0.01):
            peak[0] = max(peak[0], _rss_mib())

    watcher = threading.Thread(target=sample, daemon=True)
    watcher.start()
    seconds = _timed(lambda: v.ingest_eeg(pid, Path(edf)))
    done.set()
    watcher.join()
    v.close()
    print(json.dumps({"seconds": seconds, "peak_growth_mib": max(peak) - before}))


def _ingest(workdir: Path, vault_dir: Path, duration_s: int) -> dict[str, float]:
    import warnings

    import edfio
    import numpy as np
    from mindward_bench.edf import write_test_edf

    edf = workdir / "bench.edf"
    write_test_edf(edf, duration_s=duration_s, n_channels=64, rate=1000)
    raw = hazmat.RawAesGcm(crypto.new_key())

    def baseline() -> None:  # merely reading it with the same library, plus raw AES-GCM
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            rec = edfio.read_edf(edf)
        for i, signal in enumerate(rec.signals):
            raw.encrypt(i.to_bytes(12, "big"), np.ascontiguousarray(signal.digital).tobytes())

    t_base = _timed(baseline)
    code = (f"from mindward_bench.run import ingest_child; ingest_child({str(vault_dir)!r}, {str(edf)!r})")
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True)
    child = json.loads(out.stdout)
    size = edf.stat().st_size
    edf.unlink()
    return {"ingest_edf_mib": size / MIB, "ingest_s": child["seconds"], "edfio_read_aes_s": t_base,
            "ingest_vs_read_aes": t_base / child["seconds"],
            "ingest_peak_mib": child["peak_growth_mib"]}


# -- the policy engine ----------------------------------------------------------------------------


def _decide_cohort(v: Vault, n: int) -> dict[str, float]:
    """Decide one request for `n` participants, audit entries written in one batch."""
    from mindward_bench.decide import synthetic_cohort

    from vault.policy.engine import PolicyEngine

    policy, request, consents, affordable, at = synthetic_cohort(n)
    engine = PolicyEngine(policy, lambda _pids: consents, v._audit_batch, lambda: at)
    before = v._audit.size
    seconds = _timed(lambda: engine.decide(request, affordable=affordable))
    return {"decide_participants": n, "decide_s": seconds, "decisions_per_s": n / seconds,
            "decide_audit_entries": v._audit.size - before}


# -- the run ----------------------------------------------------------------------------------


def run_all(*, quick: bool = False) -> dict[str, Any]:
    blob_mib, mem_mib, singles, batch, verify_n, decide_n, ingest_s, withdraw_mib = (
        (16, 64, 50, 20_000, 20_000, 10_000, 30, 32) if quick
        else (256, 1024, 300, 100_000, 1_000_000, 100_000, 3600, 1024))
    workdir = Path(tempfile.mkdtemp(prefix="mindward-bench-"))
    figures: dict[str, Any] = {"quick": quick}
    from mindward_bench.startup import bench_startup

    figures.update(bench_startup(runs=5 if quick else 15))  # first, before the disk is busy
    try:
        data = crypto.random_bytes(MIB)
        v = Vault.init(workdir / "vault", _PASSPHRASE)
        try:
            # alternate baseline and vault runs, best of two each, so neither gets the warm disk
            rates = [(_raw_rates(workdir, data, blob_mib * MIB), _vault_rates(v, data, blob_mib * MIB))
                     for _ in range(2)]
            raw_w, raw_r = (max(r[0][i] for r in rates) for i in (0, 1))
            store, read = (max(r[1][i] for r in rates) for i in (0, 1))
            figures.update(blob_mib=blob_mib, raw_write_mib_s=raw_w, raw_read_mib_s=raw_r,
                           store_mib_s=store, read_mib_s=read,
                           store_vs_raw=store / raw_w, read_vs_raw=read / raw_r)
            bare = _bare_sqlite_rate(workdir, singles)
            ours = _audit_single_rate(v, singles)
            figures.update(sqlite_single_per_s=bare, audit_single_per_s=ours,
                           audit_single_vs_sqlite=ours / bare)
            bare_batch = max(_bare_batch_rate(workdir, batch) for _ in range(2))
            ours_batch = _audit_batch_rate(v, batch)
            figures.update(sqlite_batch_per_s=bare_batch, audit_batch_per_s=ours_batch,
                           audit_batch_vs_sqlite=ours_batch / bare_batch)
            figures.update(_decide_cohort(v, decide_n))
            figures.update(_verify_ratio(v, verify_n))
        finally:
            v.close()
        mem = _memory(workdir / "vault", mem_mib)
        figures.update(mem, store_1gib_peak_mib=mem["store_peak_growth_mib"])
        figures.update(_ingest(workdir, workdir / "vault", ingest_s))
        from mindward_bench.withdraw import bench_withdraw

        figures.update(bench_withdraw(workdir, big_mib=withdraw_mib, repeat=3 if quick else 5))
        from mindward_bench.export import bench_export_fresh
        from mindward_bench.noise import bench_samplers

        export = bench_export_fresh(n_participants=1000 if quick else 10_000,
                                    n_items=200 if quick else 2000, phases=False, door_sample=0,
                                    repeats=2 if quick else 5)
        figures.update(export_s=export["export_s"], export_pandas_s=export["baseline_s"],
                       export_matrix_vs_pandas=export["ratio"], export_unit=export["unit"])
        samplers = bench_samplers()
        figures.update(sampler_laplace_per_s=samplers["laplace_per_s"],
                       sampler_vs_opendp=samplers["laplace_ratio"] or 0.0)
        from mindward_bench.service import bench_service

        figures.update(bench_service(workdir, **SERVICE_SIZES["quick" if quick else "full"]))
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    figures["targets"] = {name: {"rule": f"{op} {limit}", "value": figures[name],
                                 "met": _met(op, figures[name], limit)}
                          for name, (op, limit) in _TARGETS.items()}
    return figures


def _met(op: str, value: float, limit: float) -> bool:
    return {">=": value >= limit, "<": value < limit, "<=": value <= limit}[op]


def format_report(figures: dict[str, Any]) -> str:
    lines = [f"mindward bench ({'quick' if figures['quick'] else 'full'} sizes)"]
    for name, target in figures["targets"].items():
        mark = "ok  " if target["met"] else "MISS"
        lines.append(f"  {mark} {name:<26} {target['value']:>12.3f}   target {target['rule']}")
    lines.append("  raw AES-GCM write {raw_write_mib_s:.0f} MiB/s, read {raw_read_mib_s:.0f} MiB/s; "
                 "vault store {store_mib_s:.0f} MiB/s, read {read_mib_s:.0f} MiB/s".format(**figures))
    lines.append("  durable appends: bare SQLite {sqlite_single_per_s:.0f}/s, audit "
                 "{audit_single_per_s:.0f}/s; in one batch: bare SQLite {sqlite_batch_per_s:.0f}/s, "
                 "audit {audit_batch_per_s:.0f}/s; verify {audit_verify_entries} entries in "
                 "{audit_verify_s:.2f} s (bare hashlib {hashlib_s:.2f} s)".format(**figures))
    lines.append("  ingest of a {ingest_edf_mib:.0f} MiB EDF: {ingest_s:.2f} s (edfio read + raw AES-GCM "
                 "{edfio_read_aes_s:.2f} s), peak memory growth {ingest_peak_mib:.0f} MiB; "
                 "{decide_participants} decisions in {decide_s:.3f} s".format(**figures))
    lines.append("  export of {export_unit}-unit matrix: {export_s:.2f} s vs pandas pivot + Parquet "
                 "{export_pandas_s:.2f} s; discrete Laplace {sampler_laplace_per_s:.0f} samples/s"
                 .format(**figures))
    lines.append("  start-up: {startup_command} {startup_version_s:.3f} s, --help {startup_help_s:.3f} s, "
                 "python -c 'import typer' {startup_typer_s:.3f} s (medians of {startup_runs}); "
                 "heavy modules at import: ".format(**figures)
                 + (", ".join(figures["startup_heavy_modules"]) or "none"))
    from mindward_bench.service import format_lines

    lines.extend(format_lines(figures))
    if figures["quick"]:
        lines.append("  (quick sizes: the targets are stated for the full run)")
    return "\n".join(lines)


def command(*, quick: bool = False) -> tuple[dict[str, Any], str]:
    """`mindward bench`, as the `mindward.commands` entry point: the figures and their text."""
    figures = run_all(quick=quick)
    return figures, format_report(figures)
