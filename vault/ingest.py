"""Taking recordings and scores in: de-identify, check consent for storage, encrypt, record.

Called through the `Vault` facade (`ingest_eeg`, `ingest_scores`). Every ingest
needs a consent version that grants the category for at least one purpose and
is neither expired nor withdrawn; otherwise it is refused and the refusal audited.
All files of one ingest are written first and committed in one transaction.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import re
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from vault import crypto, registry, scores, storage, strictjson
from vault.consent import ConsentVersion
from vault.edf import DeidOptions, deidentified_blocks, npy_deidentified_blocks
from vault.edf_header import choose_date_offset, read_header, uniform_below
from vault.errors import InvalidInput, NotFound, PolicyRefusal, UsageError

if TYPE_CHECKING:
    from vault.api import Vault

EEG = "eeg-raw"
SCORE_KINDS = {"derived": "scores-derived", "explicit": "ratings-explicit"}
# A NumPy sidecar without a start date is dated here (EDF+ needs a date).
OFFSET_REFERENCE = dt.date(2026, 1, 1)
_NEVER = re.compile(r"(?!)")


def covers_storage(consent: ConsentVersion | None, category: str, now: dt.datetime) -> bool:
    """Some purpose grants `category` with a status that permits processing, not expired."""
    if consent is None or consent.is_expired(now):
        return False
    return any(p.permits and category in p.categories for p in consent.purposes.values())


def _require_storage_consent(v: Vault, pids: list[str], category: str, now: dt.datetime) -> None:
    consents = registry.latest_consents(v._conn, pids)
    refused = [pid for pid in pids if not covers_storage(consents.get(pid), category, now)]
    if refused:
        v._audit_batch([{"actor": v.member, "action": f"ingest.{category}", "decision": "refuse",
                         "subjects": refused, "reasons": ["no-consent-for-storage"]}], now)
        raise PolicyRefusal(f"{len(refused)} participant(s) have no current consent covering "
                            f"storage of {category}; nothing was stored")


def date_offset(v: Vault, pid: str, start: dt.date) -> int:
    """The participant's secret date shift: chosen at their first recording (kept in range
    for it, with years of headroom), stored wrapped under their own key, reused after."""
    known = v._keys.date_offset(v._conn, pid)
    if known is not None:
        return known
    days = choose_date_offset(lambda n: uniform_below(n, crypto.random_bytes), start)
    with storage.transaction(v._conn):
        v._keys.store_date_offset(v._conn, pid, days)
    stored = v._keys.date_offset(v._conn, pid)
    assert stored is not None
    return stored


def start_date(path: Path, sidecar: Path | None) -> dt.date:
    """The recording's start date as its header (or sidecar) states it, before any shift."""
    if sidecar is not None:
        try:
            doc = strictjson.loads(Path(sidecar).read_bytes())
            if not isinstance(doc, dict):
                raise ValueError("not an object")
            return dt.date.fromisoformat(str(doc.get("start_date") or OFFSET_REFERENCE))
        except (OSError, ValueError) as exc:
            raise InvalidInput("sidecar: not readable JSON with a YYYY-MM-DD start_date") from exc
    try:
        with open(path, "rb") as fh:
            header, _ = read_header(fh, os.fstat(fh.fileno()).st_size)
    except OSError as exc:
        raise NotFound(f"cannot read {path}") from exc
    return header.start_date


def _prefixed(header: bytes, blocks: Iterator[bytes]) -> Iterator[bytes]:
    yield header
    yield from blocks


def ingest_eeg(v: Vault, pid: str, path: Path, *, sidecar: Path | None, event_codes: str | None,
               keep_sex: bool, age_band_years: int | None, keep_header_identity: bool,
               now: dt.datetime) -> dict[str, Any]:
    registry.require_participant(v._conn, pid)
    _require_storage_consent(v, [pid], EEG, now)
    pattern = v.policy.categories[EEG].event_code_pattern if event_codes is None else event_codes
    try:
        compiled = re.compile(pattern) if pattern else _NEVER
    except re.error:
        raise UsageError("--event-codes is not a valid regular expression") from None
    path = Path(path)
    numpy_input = path.suffix.lower() in (".npy", ".npz")
    if numpy_input and sidecar is None:
        raise UsageError("NumPy recordings need --sidecar (JSON: sampling rate, channels, units)")
    options = DeidOptions(date_offset_days=date_offset(v, pid, start_date(path, sidecar if numpy_input
                                                                          else None)),
                          event_codes=compiled, keep_sex=keep_sex, age_band_years=age_band_years)
    if numpy_input:
        assert sidecar is not None
        deid = npy_deidentified_blocks(path, sidecar, options)
    else:
        deid = deidentified_blocks(path, options)
    key = v._keys.participant_key(v._conn, pid)
    blob_id = "b-" + crypto.random_id(12)
    info = v._store.write(key, pid, blob_id, EEG, _prefixed(deid.header, deid.blocks))
    written = [blob_id]
    try:
        identity = None
        if keep_header_identity and deid.identity.values:
            record = json.dumps({"removed_from_recording": blob_id,
                                 "fields": dict(deid.identity.values)}).encode()
            identity = v._store.write(key, pid, "b-" + crypto.random_id(12), "identity-contact",
                                      [record])
            written.append(identity.blob_id)
        report = deid.report.as_dict()
        meta = deid.meta.as_dict()
        at = _at(now)
        with storage.transaction(v._conn):
            v._insert_blob(info, at)
            if identity is not None:
                v._insert_blob(identity, at)
            v._conn.execute(
                "INSERT INTO recordings (blob_id, pid, format, meta, deid) VALUES (?, ?, ?, ?, ?)",
                (blob_id, pid, deid.meta.format, json.dumps(meta), json.dumps(report)))
            v._audit.append({"actor": v.member, "action": "ingest.eeg", "subjects": [pid],
                             "decision": "done",
                             "details": {"blob": blob_id, "format": deid.meta.format,
                                         "fields_changed": report["fields_changed"],
                                         "annotations_relabelled": report["annotations_relabelled"],
                                         "date_shift_applied": report["date_shift_applied"]}}, at)
    except BaseException:
        for blob in written:
            v._store.discard(blob)
        raise
    return {"participant_id": pid, "blob_id": blob_id, "deidentification": report,
            "recording": {k: meta[k] for k in ("format", "channels", "sampling_rates", "duration",
                                               "n_records", "annotation_count")},
            "identity_kept": identity is not None}


def ingest_scores(v: Vault, path: Path, kind: str, *, now: dt.datetime) -> dict[str, Any]:
    if kind not in SCORE_KINDS:
        raise UsageError("--kind is 'derived' or 'explicit'")
    category = SCORE_KINDS[kind]
    rows = scores.read_rows(path, category, v.policy.categories[category])
    groups = scores.by_participant(rows)
    known = registry.latest_consents(v._conn, list(groups))
    for pid, group in groups.items():
        if pid not in known:
            raise InvalidInput(f"scores file: row {group[0].row}: unknown or erased participant")
    _require_storage_consent(v, list(groups), category, now)
    plan: list[tuple[str, bytes, str, list[str]]] = []
    skipped = 0
    for pid, group in groups.items():
        body = scores.canonical(group)
        batch_tag = v._keys.participant_tag(v._conn, pid, "score-batch", category.encode() + body)
        if v._conn.execute("SELECT 1 FROM score_batches WHERE pid = ? AND category = ? AND "
                           "batch_tag = ?", (pid, category, batch_tag)).fetchone():
            skipped += 1  # the same rows were ingested before: idempotent
            continue
        item_tags = [v._keys.participant_tag(v._conn, pid, "score-item",
                                             category.encode() + b"\x00" + r.item.encode())
                     for r in group]
        for row, tag in zip(group, item_tags, strict=True):
            if v._conn.execute("SELECT 1 FROM score_items WHERE pid = ? AND category = ? AND "
                               "item_tag = ?", (pid, category, tag)).fetchone():
                raise InvalidInput(f"scores file: row {row.row}: this participant already has a "
                                   f"stored {category} value for this item; nothing was stored")
        plan.append((pid, body, batch_tag, item_tags))
    written = []
    try:
        for pid, body, _, _ in plan:
            key = v._keys.participant_key(v._conn, pid)
            written.append(v._store.write(key, pid, "b-" + crypto.random_id(12), category, [body]))
        at = _at(now)
        with storage.transaction(v._conn):
            for info, (pid, _, batch_tag, item_tags) in zip(written, plan, strict=True):
                v._insert_blob(info, at)
                v._conn.execute("INSERT INTO score_batches (blob_id, pid, category, batch_tag, rows) "
                                "VALUES (?, ?, ?, ?, ?)",
                                (info.blob_id, pid, category, batch_tag, len(item_tags)))
                v._conn.executemany(
                    "INSERT INTO score_items (pid, category, item_tag, blob_id) VALUES (?, ?, ?, ?)",
                    [(pid, category, tag, info.blob_id) for tag in item_tags])
            v._audit.append({"actor": v.member, "action": f"ingest.{category}",
                             "subjects": [p for p, *_ in plan], "decision": "done",
                             "details": {"rows": sum(len(t) for *_, t in plan),
                                         "batches": len(plan), "already_stored": skipped}}, at)
    except BaseException:
        for info in written:
            v._store.discard(info.blob_id)
        raise
    return {"category": category, "participants": len(groups), "rows": len(rows),
            "batches_stored": len(plan), "batches_already_stored": skipped}


def _at(now: dt.datetime) -> str:
    return now.astimezone(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
