"""Benchmark: de-identified streaming against plain reading of the same file.

Baseline: edfio reads every signal's digital samples (lazily via its memory
map, and eagerly; the faster of the two counts) and raw AES-GCM encrypts them.
Measured: `vault.formats.edf.deidentified_blocks` streamed through raw AES-GCM, and
through the store's chunked encryption (the closest stand-in for ingest).
Returns numbers and prints nothing. The keys are fresh and thrown away; the
counter nonces are safe only because of that (benchmark only).
"""

from __future__ import annotations

import os
import time
import tracemalloc
import warnings
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import edfio
import numpy as np

from vault import crypto
from vault.crypto import hazmat, sealing
from vault.formats.edf import DEFAULT_BLOCK_BYTES, DeidOptions, deidentified_blocks
from vault.formats.edf_header import BLOCK, field, pack_header
from vault.policy.event_codes import EventCodes


def write_test_edf(
    path: str | os.PathLike[str],
    *,
    duration_s: int = 3600,
    n_channels: int = 64,
    rate: int = 1000,
    seed: int = 7,
) -> int:
    """Write an invented EDF+C recording (sines plus noise, stimulus codes); return its size."""
    rng = np.random.default_rng(seed)
    ann_bytes = 64
    blank = field("", 80, "text")

    def signal(label: str, unit: str, lo: str, hi: str, n: int) -> dict[str, bytes]:
        return {"label": field(label, 16, "l"), "transducer": blank, "dimension": field(unit, 8, "d"),
                "physical_min": field(lo, 8, "p"), "physical_max": field(hi, 8, "p"),
                "digital_min": field("-32768", 8, "d"), "digital_max": field("32767", 8, "d"),
                "prefilter": blank, "samples_per_record": field(str(n), 8, "n"),
                "reserved": blank[:32]}  # fmt: skip

    signals = [signal(f"EEG{i:03}", "uV", "-3276.8", "3276.7", rate) for i in range(n_channels)]
    signals.append(signal("EDF Annotations", "", "-1", "1", ann_bytes // 2))
    fixed = {
        "version": b"0       ", "patient": field("X X X X", 80, "p"),
        "recording": field("Startdate 02-MAR-2021 X X X", 80, "r"),
        "startdate": field("02.03.21", 8, "d"), "starttime": field("10.15.00", 8, "t"),
        "header_bytes": field(str(BLOCK * (n_channels + 2)), 8, "h"),
        "reserved": field("EDF+C", 44, "r"), "n_records": field(str(duration_s), 8, "n"),
        "record_duration": field("1", 8, "d"), "n_signals": field(str(n_channels + 1), 4, "n"),
    }  # fmt: skip
    t = np.arange(rate) / rate
    freqs = rng.uniform(1.0, 40.0, size=(n_channels, 1))
    templates = []
    for k in range(8):  # eight distinct seconds, cycled
        wave = 800 * np.sin(2 * np.pi * freqs * (t + k)) + rng.normal(0, 60, (n_channels, rate))
        templates.append(np.clip(np.rint(wave * 10), -32768, 32767).astype("<i2").tobytes())
    with Path(path).open("wb") as out:
        out.write(pack_header(fixed, signals))
        for k in range(duration_s):
            tal = f"+{k}\x14\x14\x00".encode()
            if k % 10 == 3:
                tal += f"+{k}.25\x14stim/{k % 7}\x14\x00".encode()
            if k % 100 == 50:
                tal += f"+{k}.5\x150.5\x14free text note\x14\x00".encode()
            out.write(templates[k % 8] + tal.ljust(ann_bytes, b"\x00"))
    return Path(path).stat().st_size


def _timed(run: Callable[[], None]) -> float:
    start = time.perf_counter()
    run()
    return time.perf_counter() - start


def bench_deid(
    path: str | os.PathLike[str], *, block_bytes: int = DEFAULT_BLOCK_BYTES, repeats: int = 2
) -> dict[str, Any]:
    """Seconds, MB/s and ratios (>= 1 means de-identification is faster than the baseline)."""
    path = Path(path)
    size = path.stat().st_size
    opts = DeidOptions(date_offset_days=-3000, event_codes=EventCodes([r"stim/\d{1,4}"]))
    raw = hazmat.RawAesGcm(crypto.new_key())
    key = crypto.new_key()

    def nonces() -> Iterator[bytes]:
        n = 0
        while True:
            n += 1
            yield n.to_bytes(12, "big")

    def plain_read() -> None:
        with path.open("rb") as f:
            while f.read(block_bytes):
                pass

    def baseline(lazy: bool) -> None:
        nonce = nonces()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if path.suffix.lower() == ".bdf":
                rec = edfio.read_bdf(path)  # edfio always reads BDF whole
            else:
                rec = edfio.read_edf(path, lazy_load_data=lazy)
        for signal in rec.signals:
            raw.encrypt(next(nonce), np.ascontiguousarray(signal.digital).tobytes())

    def deid_only() -> None:
        d = deidentified_blocks(path, opts, block_bytes)
        for _block in d.blocks:
            pass

    def deid_raw() -> None:
        nonce = nonces()
        d = deidentified_blocks(path, opts, block_bytes)
        raw.encrypt(next(nonce), d.header)
        for block in d.blocks:
            raw.encrypt(next(nonce), block)

    def deid_chunked() -> None:
        d = deidentified_blocks(path, opts, block_bytes)
        enc = sealing.ChunkedEncryptor(key, b"edf-bench")
        enc.update(d.header)
        for block in d.blocks:
            enc.update(block)
        enc.finalize()

    plain_read()  # warm the page cache so every pass reads from the same place
    runs = {"plain_read": plain_read, "edfio_lazy_aes_gcm": lambda: baseline(True),
            "edfio_eager_aes_gcm": lambda: baseline(False), "deid_only": deid_only,
            "deid_aes_gcm": deid_raw, "deid_chunked": deid_chunked}  # fmt: skip
    seconds = {name: min(_timed(run) for _ in range(repeats)) for name, run in runs.items()}
    tracemalloc.start()
    deid_chunked()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    base = min(seconds["edfio_lazy_aes_gcm"], seconds["edfio_eager_aes_gcm"])  # the faster
    return {
        "file_bytes": size,
        "seconds": seconds,
        "mb_per_s": {name: size / s / 1e6 for name, s in seconds.items()},
        "ratio_deid_aes_gcm_vs_baseline": base / seconds["deid_aes_gcm"],
        "ratio_deid_chunked_vs_baseline": base / seconds["deid_chunked"],
        "peak_traced_bytes_deid_chunked": peak,
    }
