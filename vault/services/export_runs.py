"""Exports in progress: recorded before any file exists, staged beside their target, renamed
into place at the end, and finished or undone at the next open if the process died.

States of an `export_runs` row:

- `staged`: the budget is charged (same transaction) and no file is written yet;
  undone = refunded (nothing left the vault).
- `writing`: files are being written into the staging folder. Whoever runs the
  export can read them there, so an interrupted run is never refunded (that would
  let a caller kill the process, copy the files and get the budget back); the
  folder is removed and the charge stands (`void`).
- `signed`: every file is complete, the manifest is signed and the lineage recorded;
  an interrupted run is finished (manifest written, folder renamed into place).
- `done`, `refunded`, `void`: settled. An export that charges no budget (EEG) is
  finished from `signed` and otherwise removed (`void`).

The staging folder is `.<name of --out>.mindward-staging-<export id>` beside `--out`
(same file system, so the final rename is atomic). Export folders are 0700 and files
0600 whatever the umask: pseudonymised data is still personal data.
"""

from __future__ import annotations

import json
import os
import shutil
from collections.abc import Mapping
from fractions import Fraction
from pathlib import Path
from typing import TYPE_CHECKING, Any

from vault.errors import Conflict
from vault.privacy.accountant import Cost
from vault.services import budget
from vault.storage import db as storage
from vault.storage import export_runs as runs
from vault.storage.files import fsync_path

if TYPE_CHECKING:
    from vault.services.context import Context

STAGED, WRITING, SIGNED, DONE, REFUNDED, VOID = ("staged", "writing", "signed", "done",
                                                 "refunded", "void")
OPEN_STATES = (STAGED, WRITING, SIGNED)
STAGING_MARK = ".mindward-staging-"
MANIFEST_NAME = "manifest.json"
DIR_MODE, FILE_MODE = 0o700, 0o600


def check_out(out: Path) -> Path:
    """`out` must be a new or empty folder under folders (checked before anything is charged)."""
    out = Path(out)
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise Conflict(f"{out} exists and is not an empty folder; refusing to write an export there")
    parent = out.absolute().parent
    while not parent.exists():
        parent = parent.parent
    if not parent.is_dir():
        raise Conflict(f"{parent} is not a folder; refusing to write an export below it")
    return out


def staging_path(out: Path, export_id: str) -> Path:
    return out.parent / f".{out.name}{STAGING_MARK}{export_id}"


def make_private_dirs(path: Path) -> None:
    """Create `path` and any missing ancestors as 0700 (whatever the umask)."""
    missing = []
    probe = path
    while not probe.exists():
        missing.append(probe)
        probe = probe.parent
    for directory in reversed(missing):
        directory.mkdir(mode=DIR_MODE)
        os.chmod(directory, DIR_MODE)


def secure_tree(root: Path) -> None:
    """Every folder below `root` (and it) 0700, every file 0600."""
    os.chmod(root, DIR_MODE)
    for base, dirs, files in os.walk(root):
        for name in dirs:
            os.chmod(Path(base) / name, DIR_MODE)
        for name in files:
            os.chmod(Path(base) / name, FILE_MODE)


def begin(ctx: Context, *, export_id: str, kind: str, purpose: str, out: Path, at: str,
          costs: Mapping[str, Cost] | None = None) -> Path:
    """Record the run (and charge `costs`) in one transaction, then create the staging folder."""
    out = Path(out).absolute()
    staging = staging_path(out, export_id)
    with storage.transaction(ctx.conn):
        charged = (budget.charge_in_transaction(ctx, purpose, costs, export_id=export_id, at=at)
                   if costs is not None else [])
        runs.insert_run(ctx.conn, export_id=export_id, kind=kind, purpose=purpose,
                        staging=str(staging), out=str(out), state=STAGED,
                        charged=json.dumps(charged), at=at)
        if costs:
            runs.insert_charges(ctx.conn, export_id,
                                [(pid, str(c.epsilon), str(c.rho)) for pid, c in costs.items()])
    make_private_dirs(out.parent)
    staging.mkdir(mode=DIR_MODE)
    os.chmod(staging, DIR_MODE)
    fsync_path(out.parent)
    return staging


def writing(ctx: Context, export_id: str) -> None:
    """From here on files exist in the staging folder: an interruption is no longer refunded."""
    with storage.transaction(ctx.conn):
        runs.set_state(ctx.conn, export_id, WRITING)


def mark_signed(ctx: Context, export_id: str, signed: bytes) -> None:
    """Inside `exports.sign_and_record`'s transaction: the files are complete and signed."""
    runs.set_signed(ctx.conn, export_id, SIGNED, signed)


def publish(ctx: Context, export_id: str, staging: Path, out: Path, signed: Mapping[str, Any],
            at: str) -> None:
    """Write the manifest, rename the staging folder into place, mark the run done."""
    _place(staging, Path(out).absolute(), json.dumps(signed, indent=2, sort_keys=True) + "\n")
    row = runs.run(ctx.conn, export_id)
    assert row is not None
    _settle(ctx, row, DONE, at)


def _place(staging: Path, out: Path, manifest_text: str) -> None:
    manifest = staging / MANIFEST_NAME
    if not manifest.exists():
        fd = os.open(manifest, os.O_WRONLY | os.O_CREAT | os.O_EXCL, FILE_MODE)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(manifest_text)
            fh.flush()
            os.fsync(fh.fileno())
    secure_tree(staging)
    fsync_path(staging)
    if out.is_dir() and not any(out.iterdir()):
        out.rmdir()
    os.replace(staging, out)
    fsync_path(out.parent)


def _settle(ctx: Context, row: tuple[Any, ...], state: str, at: str,
            report: Mapping[str, str] | None = None) -> None:
    """One transaction: the refund (for `refunded`), the final state, the audit entry."""
    export_id, kind, purpose, _, _, found, charged = row[:7]
    with storage.transaction(ctx.conn):
        if state == REFUNDED:
            costs = {pid: Cost(Fraction(e), Fraction(r)) for pid, e, r in runs.charges(ctx.conn, export_id)}
            if costs and json.loads(charged):
                budget.refund_in_transaction(ctx, purpose, json.loads(charged), costs,
                                             export_id=export_id, at=at)
        runs.settle(ctx.conn, export_id, state, at)
        if report is not None:
            ctx.audit.append({"actor": ctx.member, "action": "export.settle", "purpose": purpose,
                             "subjects": [], "decision": "done",
                             "details": {"export": export_id, "kind": kind, "state_found": found,
                                         **report}}, at)


def _outcome(ctx: Context, row: tuple[Any, ...], at: str, how: str, *, retry: bool = True) -> str:
    """Finish or undo one unsettled run: files first, then one transaction. `retry`: a signed
    run whose folder is not in place yet is put in place (at open), else voided."""
    export_id, _, _, staging_text, out_text, state, _, signed = row
    staging, out = Path(staging_text), Path(out_text)
    outcome = None
    if state == SIGNED:
        try:
            placed = json.loads((out / MANIFEST_NAME).read_text())["body"]["export_id"] == export_id
        except (OSError, ValueError, KeyError, TypeError):
            placed = False
        if not placed and retry and staging.is_dir() and signed is not None and (
                not out.exists() or (out.is_dir() and not any(out.iterdir()))):
            _place(staging, out, json.dumps(json.loads(signed), indent=2, sort_keys=True) + "\n")
            placed = True
        if placed:
            outcome, final = "finished", DONE
    if outcome is None:
        # only ever a folder this module named (a damaged row must not aim rmtree elsewhere)
        if staging == staging_path(out, export_id):
            shutil.rmtree(staging, ignore_errors=True)
        if staging.parent.is_dir():
            fsync_path(staging.parent)
        if not json.loads(row[6]):  # nothing was charged (an EEG export): nothing to credit
            outcome, final = "removed", VOID
        else:
            outcome, final = (("refunded", REFUNDED) if state == STAGED else
                              ("charged-not-released", VOID))
    _settle(ctx, row, final, at, {"interrupted": how, "outcome": outcome})
    return outcome


def abandon(ctx: Context, export_id: str, at: str) -> str:
    """After a failure in this process: undo or void the run and say so in the audit log."""
    row = runs.run(ctx.conn, export_id)
    if row is None or row[5] not in OPEN_STATES:
        return "none"
    # a signed run already in place is finished; one not in place is not retried here (the
    # failure was ours: disk full...) but voided, its files having been written
    return _outcome(ctx, row, at, "failed", retry=False)


def recover(ctx: Context) -> list[dict[str, str]]:
    """At open: finish or undo every run a killed process left unsettled (audited)."""
    storage.add_missing_tables(ctx.conn)
    rows = runs.runs_in(ctx.conn, OPEN_STATES)
    if not rows:
        return []
    at = ctx.stamp()
    return [{"export_id": row[0], "outcome": _outcome(ctx, row, at, "killed")} for row in rows]
