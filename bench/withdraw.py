"""Benchmark of erasure: a full withdrawal's time against the participant's data size.

Cryptographic erase destroys one wrapped key, deletes a few rows per blob and
moves the files aside, so a participant holding 1 GiB should erase about as
fast as one holding 1 MiB (target: ratio <= 2, same number of blobs). Unlinking
the files afterwards (`withdraw.reclaim`) only frees disk space; it is timed
separately, against bare `os.unlink` of files of the same sizes. Also times the
offline verification of a deletion receipt (target: under 50 ms) against a bare
Ed25519 verification measured in the same run. Random bytes only, in a
throw-away vault in the system's temporary directory, deleted afterwards.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
import statistics
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

from vault import crypto
from vault.api import Vault, moment
from vault.audit import receipt
from vault.services import withdraw

MIB = 1 << 20
_PASSPHRASE = "benchmark passphrase, not a secret"  # noqa: S105 (throw-away vault)
TARGETS = {"withdraw_1gib_vs_1mib": ("<=", 2.0), "receipt_verify_ms": ("<", 50.0)}


def _chunks(block: bytes, total: int) -> Iterator[bytes]:
    for start in range(0, total, len(block)):
        yield block[: min(len(block), total - start)]


def _participant(v: Vault, total: int, blobs: int, block: bytes) -> str:
    pid = v.new_participant()
    for _ in range(blobs):
        v.put_blob(pid, "eeg-raw", _chunks(block, total // blobs))
    return pid


def _erase_seconds(v: Vault, pid: str, now: dt.datetime) -> tuple[float, float, dict[str, object]]:
    """(erase seconds, reclaim seconds, receipt): the erasure, then unlinking the files."""
    withdraw.request_withdrawal(v._context(), pid, received=now.date())
    start = time.perf_counter()
    result = withdraw.process(v._context(), pid, reclaim_space=False)
    erased = time.perf_counter()
    withdraw.reclaim(v._context())
    return erased - start, time.perf_counter() - erased, result["receipt"]


def _bare_unlink_seconds(directory: Path, total: int, blobs: int, block: bytes) -> float:
    """Baseline: fsynced files of the same sizes, then os.unlink alone."""
    paths = []
    for i in range(blobs):
        path = directory / f"baseline-{i}"
        with open(path, "wb") as out:
            for chunk in _chunks(block, total // blobs):
                out.write(chunk)
            out.flush()
            os.fsync(out.fileno())
        paths.append(path)
    start = time.perf_counter()
    for path in paths:
        os.unlink(path)
    return time.perf_counter() - start


def bench_withdraw(workdir: Path | None = None, *, small_mib: int = 1, big_mib: int = 1024,
                   blobs: int = 4, repeat: int = 5) -> dict[str, float]:
    """Median erase time for `small_mib` and `big_mib` participants (alternating runs)."""
    root = Path(tempfile.mkdtemp(prefix="mindward-withdraw-bench-", dir=workdir))
    now = moment()
    block = crypto.random_bytes(MIB)
    try:
        v = Vault.init(root / "vault", _PASSPHRASE)
        times: dict[str, list[float]] = {k: [] for k in (
            "small", "big", "small_reclaim", "big_reclaim", "small_unlink", "big_unlink")}
        document: dict[str, object] = {}
        for _ in range(repeat):
            for size, name in ((small_mib, "small"), (big_mib, "big")):
                pid = _participant(v, size * MIB, blobs, block)
                erase, freed, document = _erase_seconds(v, pid, now)
                times[name].append(erase)
                times[name + "_reclaim"].append(freed)
                times[name + "_unlink"].append(_bare_unlink_seconds(root, size * MIB, blobs, block))
        public = v.public_key
        v.close()
        verify = []
        for _ in range(50):
            start = time.perf_counter()
            ok, _reasons = receipt.verify_receipt(document, public)
            verify.append(time.perf_counter() - start)
            assert ok
        signer = crypto.SigningKey.generate()
        signature = signer.sign("bench", b"x" * 64)
        bare = []
        for _ in range(50):
            start = time.perf_counter()
            crypto.verify_signature(signer.public_key, "bench", b"x" * 64, signature)
            bare.append(time.perf_counter() - start)
    finally:
        shutil.rmtree(root, ignore_errors=True)
    med = {k: statistics.median(x) for k, x in times.items()}
    return {
        "withdraw_small_mib": float(small_mib), "withdraw_big_mib": float(big_mib),
        "withdraw_blobs_each": float(blobs),
        "withdraw_small_s": med["small"], "withdraw_big_s": med["big"],
        "withdraw_1gib_vs_1mib": med["big"] / med["small"],
        "withdraw_worst_big_vs_best_small": max(times["big"]) / min(times["small"]),
        "reclaim_small_s": med["small_reclaim"], "reclaim_big_s": med["big_reclaim"],
        "bare_unlink_small_s": med["small_unlink"], "bare_unlink_big_s": med["big_unlink"],
        "reclaim_big_vs_bare_unlink": med["big_reclaim"] / med["big_unlink"],
        "receipt_verify_ms": statistics.median(verify) * 1000,
        "receipt_verify_vs_bare_ed25519": statistics.median(verify) / statistics.median(bare),
    }


def meets_targets(figures: dict[str, float]) -> dict[str, bool]:
    out = {}
    for name, (op, limit) in TARGETS.items():
        value = figures[name]
        out[name] = value <= limit if op == "<=" else value < limit
    return out


if __name__ == "__main__":
    figures = bench_withdraw()
    for name, value in figures.items():
        print(f"{name}: {value:.4g}")
    print(meets_targets(figures))
