"""`mindward export eeg`: granted, de-identified recordings as an EEG-BIDS dataset.

Participants get per-purpose pseudonymous labels (vault.services.exports); recordings
are the de-identified copies the vault stores, read through the one door and
streamed into the dataset; a signed manifest lists every file with its SHA-256
and the export is recorded in the lineage.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from vault.errors import IntegrityError, InvalidInput, NotFound
from vault.formats.bids import BidsWriter
from vault.formats.edf import recording_meta
from vault.formats.edf_header import demographics, parse_header, with_known_channels, without_demographics
from vault.services import export_runs, exports
from vault.storage import recordings
from vault.times import iso_utc

if TYPE_CHECKING:
    from vault.services.context import Context

MANIFEST_NAME = "manifest.json"
TASK = "dishes"


def _split_header(chunks: Iterator[bytes]) -> tuple[bytes, Iterator[bytes]]:
    """The EDF header (its length is in bytes 184-192 of the stream) and the rest."""
    first = bytearray()
    for chunk in chunks:
        first += chunk
        if len(first) >= 256:
            break
    try:
        size = int(bytes(first[184:192]).decode("ascii").strip())
    except ValueError as exc:
        raise IntegrityError("a stored recording has no readable EDF header") from exc
    while len(first) < size:
        more = next(chunks, None)
        if more is None:
            raise IntegrityError("a stored recording ends inside its header")
        first += more

    def rest() -> Iterator[bytes]:
        if len(first) > size:
            yield bytes(first[size:])
        yield from chunks

    return bytes(first[:size]), rest()


def export_eeg(ctx: Context, *, purpose: str, out: Path, recipient: str | None,
               with_demographics: bool = False) -> dict[str, Any]:
    now = ctx.now()
    categories = ["eeg-raw", *(["demographics"] if with_demographics else [])]
    grant = ctx.authorize_release(purpose, categories, export=True, recipient=recipient)
    # Sex and age band leave only under a grant that covers demographics; otherwise the
    # exported headers and participants.tsv carry none.
    keep_demographics = "demographics" in grant.categories
    rows = recordings.recordings_of(ctx.conn, ctx.grant_participants(grant))
    if not rows:
        raise NotFound("the granted participants hold no recordings")
    labels = exports.pseudonyms(ctx, purpose, {pid for _, pid, _ in rows})
    out = export_runs.check_out(out)
    export_id = exports.new_export_id()
    # recorded before any file exists, written into a staging folder, renamed into place at
    # the end; a killed run is finished or cleaned up at the next open (vault.services.export_runs)
    staging = export_runs.begin(ctx, export_id=export_id, kind="eeg-bids", purpose=purpose, out=out,
                                at=iso_utc(now))
    try:
        export_runs.writing(ctx, export_id)
        writer = BidsWriter(staging, dataset_name=f"mindward export for {purpose}", task=TASK,
                            readme_intro="De-identified EEG released by mindward under a signed "
                                         "manifest (manifest.json).")
        runs: dict[str, int] = {}
        sizes = {blob_id: size for blob_id, _, size in rows}
        people: dict[str, dict[str, str]] = {}
        for blob_id, pid, chunks in ctx.read_for_release(grant, [r[0] for r in rows]):
            runs[pid] = runs.get(pid, 0) + 1
            header, blocks = _split_header(iter(chunks))
            try:  # the metadata is the stored header itself: nothing about it is kept in clear
                parsed = parse_header(header, sizes[blob_id])
                header = with_known_channels(header, parsed)  # files stored before labels were policed
                parsed = parse_header(header, sizes[blob_id])
            except InvalidInput as exc:
                raise IntegrityError("a stored recording has no valid EDF header") from exc
            person = people.setdefault(pid, {"participant_id": labels[pid]})
            if keep_demographics:
                sex, band = demographics(parsed)
                for key, value in (("sex", sex), ("age_band", band)):
                    if person.get(key, "n/a") == "n/a":  # the first recording that states it
                        person[key] = value
            else:
                header = without_demographics(header, parsed)
            writer.add_recording(labels[pid], None, runs[pid], header, blocks, recording_meta(parsed))
        files = writer.finish([people[pid] for pid in sorted(labels)], bidsignore=[MANIFEST_NAME])
        signed = exports.sign_and_record(
            ctx, export_id=export_id, kind="eeg-bids", grant=grant, members=labels,
            body={"recordings": len(rows), "data_format": "EEG-BIDS (EDF/EDF+/BDF)",
                  "files": [{"path": f.path, "size": f.size, "sha256": f.sha256} for f in files],
                  "privacy": "no differential-privacy noise: de-identified recordings, which can "
                             "still identify a person"})
        export_runs.publish(ctx, export_id, staging, out, signed, iso_utc(now))
    except BaseException:
        export_runs.abandon(ctx, export_id, iso_utc(now))
        raise
    return {"export_id": export_id, "out": str(out), "participants": len(labels),
            "recordings": len(rows), "manifest": str(out / MANIFEST_NAME)}
