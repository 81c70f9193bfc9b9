"""Finished exports waiting for their download: `<vault>/outbox/<export id>` (0700), for the member
who made it, for an hour; removed when downloaded completely, when the hour is up, or when the
service starts again (an export the service no longer knows who made is never served)."""

from __future__ import annotations

import os
import re
import shutil
import threading
import time
import uuid
from dataclasses import dataclass
from pathlib import Path

from vault.errors import NotFound

OUTBOX_NAME = "outbox"
KEEP_S = 3600.0
EXPORT_ID = re.compile(r"x-[0-9a-z]{1,64}")


@dataclass(frozen=True)
class Waiting:
    folder: Path
    member: str
    made_at: float  # time.monotonic()


class Outbox:
    def __init__(self, vault_path: Path, *, keep_s: float = KEEP_S) -> None:
        self.root = Path(vault_path) / OUTBOX_NAME
        self.keep_s = keep_s
        self._waiting: dict[str, Waiting] = {}
        self._lock = threading.Lock()  # the vault's thread publishes, download threads finish
        self.root.mkdir(mode=0o700, exist_ok=True)
        os.chmod(self.root, 0o700)
        for leftover in self.root.iterdir():  # after the vault's own recovery at open
            _remove(leftover)

    def new_run(self) -> Path:
        """A new, not yet existing folder for the export code to write into."""
        return self.root / f"run-{uuid.uuid4().hex}"

    def publish(self, run: Path, export_id: str, member: str) -> Path:
        if not EXPORT_ID.fullmatch(export_id):
            raise NotFound("the export has an unexpected id")
        final = self.root / export_id
        os.replace(run, final)
        with self._lock:
            self._waiting[export_id] = Waiting(final, member, time.monotonic())
        return final

    def discard(self, run: Path) -> None:
        _remove(run)

    def find(self, export_id: str, member: str) -> Path:
        """The folder of a waiting export, for the member who made it only."""
        with self._lock:
            waiting = self._waiting.get(export_id)
        if (waiting is None or waiting.member != member
                or time.monotonic() - waiting.made_at > self.keep_s or not waiting.folder.is_dir()):
            raise NotFound(f"no export {export_id} waiting for you (an export is kept for its maker "
                           "for an hour, until downloaded once)")
        return waiting.folder

    def done(self, export_id: str) -> None:
        with self._lock:
            waiting = self._waiting.pop(export_id, None)
        if waiting is not None:
            _remove(waiting.folder)

    def expire(self) -> int:
        now = time.monotonic()
        with self._lock:
            old = [e for e, w in self._waiting.items() if now - w.made_at > self.keep_s]
        for export_id in old:
            self.done(export_id)
        return len(old)


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        path.unlink(missing_ok=True)
