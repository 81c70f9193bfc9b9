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
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from vault import crypto
from vault.errors import InvalidInput, NotFound, PolicyRefusal, UsageError
from vault.formats import scores, strictjson
from vault.formats.bids import check_recording
from vault.formats.edf import (
    Deidentified,
    DeidOptions,
    deidentified_blocks,
    deidentified_stream,
    npy_deidentified_blocks,
    read_stream_header,
)
from vault.formats.edf_header import (
    SupportsRead,
    choose_date_offset,
    known_start_date,
    read_header,
    uniform_below,
)
from vault.policy.consent import covers_storage
from vault.policy.event_codes import EventCodes
from vault.storage import db as storage
from vault.storage import recordings, registry
from vault.times import iso_utc

if TYPE_CHECKING:
    from vault.services.context import Context

EEG = "eeg-raw"
SCORE_KINDS = {"derived": "scores-derived", "explicit": "ratings-explicit"}
# A NumPy sidecar without a start date is dated here (EDF+ needs a date).
OFFSET_REFERENCE = dt.date(2026, 1, 1)


def _require_storage_consent(ctx: Context, pids: list[str], category: str, now: dt.datetime) -> None:
    consents = registry.latest_consents(ctx.conn, pids)
    refused = [pid for pid in pids if not covers_storage(consents.get(pid), category, now)]
    if refused:
        ctx.audit_batch([{"actor": ctx.member, "action": f"ingest.{category}", "decision": "refuse",
                         "subjects": refused, "reasons": ["no-consent-for-storage"]}])
        raise PolicyRefusal(f"{len(refused)} participant(s) have no current consent covering "
                            f"storage of {category}; nothing was stored")


def _date_offset(ctx: Context, pid: str, start: dt.date) -> tuple[int, bool]:
    """The participant's secret date shift and whether it is new: chosen at their first
    recording (kept in range for it, with years of headroom), stored wrapped under their
    own key by the caller in the same transaction as that recording, reused after."""
    known = ctx.door.date_offset(pid)
    if known is not None:
        return known, False
    return choose_date_offset(lambda n: uniform_below(n, crypto.random_bytes), start), True


def start_date(path: Path, sidecar: Path | None) -> dt.date:
    """The recording's start date as its header (or sidecar) states it, before any shift;
    OFFSET_REFERENCE when it states none (EDF+ "Startdate X", a sidecar without one)."""
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
    return known_start_date(header) or OFFSET_REFERENCE


def _prefixed(header: bytes, blocks: Iterator[bytes]) -> Iterator[bytes]:
    yield header
    yield from blocks


def event_codes_for(ctx: Context, event_codes: str | Sequence[str] | None) -> EventCodes | None:
    """The codes to keep: the caller's (a list, or one comma-separated string), else the
    policy set's; None keeps no annotation."""
    if event_codes is None:
        declared = ctx.policy.categories[EEG].event_codes
        return EventCodes(declared) if declared else None
    items = event_codes.split(",") if isinstance(event_codes, str) else list(event_codes)
    return EventCodes([i.strip() for i in items], what="event code")


def _file_digests(paths: Sequence[Path]) -> list[crypto.StreamingDigest]:
    digests = []
    for path in paths:
        digest = crypto.StreamingDigest()
        try:
            with open(path, "rb") as fh:
                while block := fh.read(1 << 20):
                    digest.update(block)
        except FileNotFoundError:
            raise NotFound("recording file not found") from None
        except OSError:
            raise InvalidInput("recording file cannot be read") from None
        digests.append(digest)
    return digests


def _content_tag(ctx: Context, pid: str, digests: Sequence[crypto.StreamingDigest]) -> str:
    """Keyed digest of the input file(s) under the participant's own data key: finds a
    re-ingest of the same content without storing anything that links files in the clear."""
    body = b"\x00".join(d.hexdigest().encode() for d in digests)
    return ctx.door.participant_tag(pid, "recording-file", body)


def _summary(report: dict[str, Any]) -> dict[str, Any]:
    """What de-identification replaced, as counts and flags: the only part kept in clear."""
    changed = report.get("fields_changed", [])
    return {"fields_changed": len(changed) if isinstance(changed, list) else int(changed),
            **{k: report.get(k, 0 if k.endswith(("_replaced", "_relabelled")) else False)
               for k in ("labels_replaced", "units_replaced", "annotations_relabelled",
                         "date_shift_applied", "date_clamped", "sex_kept", "age_band_written")}}


def scrub_clear_metadata(ctx: Context) -> int:
    """Rows stored by earlier versions kept channel metadata (labels, units, rates) and the
    full report in clear: reduce them to what this version keeps (the header inside the
    encrypted file has it all). Idempotent; audited when it changes anything."""
    rows = recordings.with_clear_metadata(ctx.conn)
    if not rows:
        return 0
    with storage.transaction(ctx.conn):
        for blob_id, deid in rows:
            recordings.scrub(ctx.conn, blob_id, json.dumps(_summary(json.loads(deid))))
        ctx.audit.append({"actor": ctx.member, "action": "recordings.scrub", "decision": "done",
                         "details": {"rows": len(rows)}}, iso_utc(ctx.now()))
    return len(rows)


def _begin_eeg(ctx: Context, pid: str, event_codes: str | Sequence[str] | None
               ) -> tuple[dt.datetime, EventCodes | None]:
    """The checks before any byte of a recording is read: role, participant, consent."""
    ctx.require_steward("ingest.eeg")
    now = ctx.now()
    registry.require_participant(ctx.conn, pid)
    _require_storage_consent(ctx, [pid], EEG, now)
    return now, event_codes_for(ctx, event_codes)


def ingest_eeg(ctx: Context, pid: str, path: Path, *, sidecar: Path | None,
               event_codes: str | Sequence[str] | None, keep_sex: bool,
               age_band_years: int | None, keep_header_identity: bool) -> dict[str, Any]:
    now, codes = _begin_eeg(ctx, pid, event_codes)
    path = Path(path)
    numpy_input = path.suffix.lower() in (".npy", ".npz")
    if numpy_input and sidecar is None:
        raise UsageError("NumPy recordings need a sidecar (JSON: sampling rate, channels, units)",
                         param="sidecar")
    if not numpy_input:
        offset, new_offset = _date_offset(ctx, pid, start_date(path, None))
        options = DeidOptions(date_offset_days=offset, event_codes=codes, keep_sex=keep_sex,
                              age_band_years=age_band_years)
        seen = crypto.StreamingDigest()
        deid = deidentified_blocks(path, options, observe=seen.update)
        return _store_eeg(ctx, pid, deid, now=now, offset=(offset, new_offset),
                          read_tag=lambda: _content_tag(ctx, pid, [seen]), expected_tag=None,
                          keep_header_identity=keep_header_identity)
    assert sidecar is not None
    inputs = [path, Path(sidecar)]
    tag = _content_tag(ctx, pid, _file_digests(inputs))  # hashed first, and again after reading
    if (row := _stored_as(ctx, pid, tag)) is not None:
        return _already_stored(ctx, pid, *row, now)
    offset, new_offset = _date_offset(ctx, pid, start_date(path, sidecar))
    options = DeidOptions(date_offset_days=offset, event_codes=codes, keep_sex=keep_sex,
                          age_band_years=age_band_years)
    deid = npy_deidentified_blocks(path, sidecar, options)
    return _store_eeg(ctx, pid, deid, now=now, offset=(offset, new_offset),
                      read_tag=lambda: _content_tag(ctx, pid, _file_digests(inputs)),
                      expected_tag=tag, keep_header_identity=keep_header_identity)


def ingest_eeg_stream(ctx: Context, pid: str, stream: SupportsRead, size: int, *, name: str,
                      event_codes: str | Sequence[str] | None, keep_sex: bool,
                      age_band_years: int | None, keep_header_identity: bool) -> dict[str, Any]:
    """`ingest_eeg` for an EDF/EDF+/BDF arriving on a sequential stream of `size` announced
    bytes (an upload): the header is checked against `size` before anything else is read,
    the data records pass through the same de-identification as a file's, a block at a time."""
    now, codes = _begin_eeg(ctx, pid, event_codes)
    if Path(str(name)).suffix.lower() in (".npy", ".npz"):
        raise UsageError("a streamed recording is EDF, EDF+ or BDF; NumPy arrays are ingested "
                         "from a file with their sidecar")
    header, raw, read = read_stream_header(stream, size)
    offset, new_offset = _date_offset(ctx, pid, known_start_date(header) or OFFSET_REFERENCE)
    options = DeidOptions(date_offset_days=offset, event_codes=codes, keep_sex=keep_sex,
                          age_band_years=age_band_years)
    seen = crypto.StreamingDigest()
    deid = deidentified_stream(header, raw, read, size, options, observe=seen.update)
    return _store_eeg(ctx, pid, deid, now=now, offset=(offset, new_offset),
                      read_tag=lambda: _content_tag(ctx, pid, [seen]), expected_tag=None,
                      keep_header_identity=keep_header_identity)


def _store_eeg(ctx: Context, pid: str, deid: Deidentified, *, now: dt.datetime,
               offset: tuple[int, bool], read_tag: Callable[[], str], expected_tag: str | None,
               keep_header_identity: bool) -> dict[str, Any]:
    """Encrypt the de-identified blocks as they stream, then record them in one transaction;
    `read_tag()` is the content tag of what was read (known once the blocks are consumed).
    Anything raised on the way discards what was written: no blob, row or audit entry."""
    check_recording(deid.meta)  # a file the export would refuse is refused now, nothing stored
    info = ctx.door.write_blob(pid, EEG, _prefixed(deid.header, deid.blocks))
    blob_id = info.blob_id
    written = [blob_id]
    try:
        tag = read_tag()
        if expected_tag is not None and tag != expected_tag:
            raise InvalidInput("recording file changed while it was being read; nothing was stored")
        if (row := _stored_as(ctx, pid, tag)) is not None:  # the same content was stored before
            ctx.door.discard(blob_id)
            return _already_stored(ctx, pid, *row, now)
        identity = None
        if keep_header_identity and deid.identity.values:
            record = json.dumps({"removed_from_recording": blob_id,
                                 "fields": dict(deid.identity.values)}).encode()
            identity = ctx.door.write_blob(pid, "identity-contact", [record])
            written.append(identity.blob_id)
        report = deid.report.as_dict()
        meta = deid.meta.as_dict()
        summary = _summary(report)
        at = iso_utc(now)
        with storage.transaction(ctx.conn):
            if offset[1]:
                ctx.door.store_date_offset(pid, offset[0])
            ctx.insert_blob(info, at)
            if identity is not None:
                ctx.insert_blob(identity, at)
            # Channel metadata stays in the encrypted file's header (the export reads it
            # there); only the format and counts of what was replaced are kept in clear.
            recordings.insert_recording(ctx.conn, blob_id=blob_id, pid=pid, fmt=deid.meta.format,
                                        summary=json.dumps(summary), content_tag=tag)
            ctx.audit.append({"actor": ctx.member, "action": "ingest.eeg", "subjects": [pid],
                             "decision": "done",
                             "details": {"blob": blob_id, "format": deid.meta.format, **summary}}, at)
    except BaseException:
        for blob in written:
            ctx.door.discard(blob)
        raise
    return {"participant_id": pid, "blob_id": blob_id, "already_stored": False,
            "deidentification": report,
            "recording": {k: meta[k] for k in ("format", "channels", "sampling_rates", "duration",
                                               "n_records", "annotation_count")},
            "identity_kept": identity is not None}


def _stored_as(ctx: Context, pid: str, tag: str) -> tuple[str, str] | None:
    return recordings.stored_as(ctx.conn, pid, tag)


def _already_stored(ctx: Context, pid: str, blob_id: str, fmt: str, now: dt.datetime) -> dict[str, Any]:
    """A second ingest of the same content: nothing new is stored; the call is audited."""
    at = iso_utc(now)
    with storage.transaction(ctx.conn):
        ctx.audit.append({"actor": ctx.member, "action": "ingest.eeg", "subjects": [pid],
                         "decision": "done", "details": {"blob": blob_id, "already_stored": True}},
                        at)
    return {"participant_id": pid, "blob_id": blob_id, "already_stored": True,
            "deidentification": None, "recording": {"format": fmt}, "identity_kept": False}


def ingest_scores(ctx: Context, source: Path | bytes, kind: str) -> dict[str, Any]:
    """Store a scores file (a path, or the bytes of an upload): all rows or none."""
    ctx.require_steward("ingest.scores")
    now = ctx.now()
    if kind not in SCORE_KINDS:
        raise UsageError("the score kind is 'derived' or 'explicit'", param="kind")
    category = SCORE_KINDS[kind]
    rows = scores.read_rows(source, category, ctx.policy.categories[category])
    groups = scores.by_participant(rows)
    known = registry.latest_consents(ctx.conn, list(groups))
    for pid, group in groups.items():
        if pid not in known:
            raise InvalidInput(f"scores file: row {group[0].row}: unknown or erased participant")
    _require_storage_consent(ctx, list(groups), category, now)
    plan: list[tuple[str, bytes, str, list[str]]] = []
    skipped = 0
    for pid, group in groups.items():
        body = scores.canonical(group)
        batch_tag = ctx.door.participant_tag(pid, "score-batch", category.encode() + body)
        if recordings.has_batch(ctx.conn, pid, category, batch_tag):
            skipped += 1  # the same rows were ingested before: idempotent
            continue
        item_tags = [ctx.door.participant_tag(pid, "score-item",
                                             category.encode() + b"\x00" + r.item.encode())
                     for r in group]
        for row, tag in zip(group, item_tags, strict=True):
            if recordings.has_item(ctx.conn, pid, category, tag):
                raise InvalidInput(f"scores file: row {row.row}: this participant already has a "
                                   f"stored {category} value for this item; nothing was stored")
        plan.append((pid, body, batch_tag, item_tags))
    written = []
    try:
        for pid, body, _, _ in plan:
            written.append(ctx.door.write_blob(pid, category, [body]))
        at = iso_utc(now)
        with storage.transaction(ctx.conn):
            for info, (pid, _, batch_tag, item_tags) in zip(written, plan, strict=True):
                ctx.insert_blob(info, at)
                recordings.insert_batch(ctx.conn, blob_id=info.blob_id, pid=pid, category=category,
                                        batch_tag=batch_tag, item_tags=item_tags)
            ctx.audit.append({"actor": ctx.member, "action": f"ingest.{category}",
                             "subjects": [p for p, *_ in plan], "decision": "done",
                             "details": {"rows": sum(len(t) for *_, t in plan),
                                         "batches": len(plan), "already_stored": skipped}}, at)
    except BaseException:
        for info in written:
            ctx.door.discard(info.blob_id)
        raise
    return {"category": category, "participants": len(groups), "rows": len(rows),
            "batches_stored": len(plan), "batches_already_stored": skipped}


def ingest_scores_bytes(ctx: Context, data: bytes, kind: str, *, name: str) -> dict[str, Any]:
    """`ingest_scores` for the bytes of an uploaded CSV (`name`: its file name)."""
    ctx.require_steward("ingest.scores")
    if not isinstance(data, bytes | bytearray | memoryview):
        raise UsageError("scores data must be bytes (the CSV file's content)")
    if Path(str(name)).suffix.lower() not in ("", ".csv"):
        raise UsageError("a scores upload is a CSV file")
    return ingest_scores(ctx, bytes(data), kind)
