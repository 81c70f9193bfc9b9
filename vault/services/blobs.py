"""Participants and their encrypted blobs, below enrolment: a bare participant, one stored
blob, the blob list and whether a participant's key still opens (stewards only)."""

from __future__ import annotations

from collections.abc import Iterable
from typing import TYPE_CHECKING, Any

from vault import crypto
from vault.storage import db as storage
from vault.storage import participants

if TYPE_CHECKING:
    from vault.access.door import BlobInfo
    from vault.services.context import Context


def new_participant(ctx: Context) -> str:
    """Create a participant with a fresh data key; returns their random id."""
    ctx.require_steward("participant.create")
    at = ctx.stamp()
    pid = crypto.random_id(16)
    key = ctx.door.new_participant(pid)
    with storage.transaction(ctx.conn):
        participants.insert_participant(ctx.conn, pid, key.wrapped, key.commitment, at)
        ctx.audit.append({"actor": ctx.member, "action": "participant.create",
                          "subjects": [pid], "decision": "done"}, at)
    return pid


def put_blob(ctx: Context, pid: str, kind: str, chunks: Iterable[bytes], *,
             details: dict[str, Any] | None = None) -> BlobInfo:
    """Encrypt and store a blob for `pid`: file first, then row and audit entry at once."""
    ctx.require_steward("blob.store")
    at = ctx.stamp()
    info = ctx.door.write_blob(pid, kind, chunks)
    try:
        with storage.transaction(ctx.conn):
            participants.insert_blob(ctx.conn, info, at)
            ctx.audit.append({"actor": ctx.member, "action": "blob.store", "subjects": [pid],
                              "decision": "done",
                              "details": {**(details or {}), "blob": info.blob_id, "kind": kind}},
                             at)
    except BaseException:
        ctx.door.discard(info.blob_id)
        raise
    return info


def blobs(ctx: Context, pid: str | None = None) -> list[dict[str, Any]]:
    ctx.require_steward("blobs.list")
    return participants.blobs(ctx.conn, pid)


def readable(ctx: Context, pid: str) -> bool:
    """Whether a participant's data key still opens (False once erased; stewards only)."""
    ctx.require_steward("participant.readable")
    return ctx.door.readable(pid)
