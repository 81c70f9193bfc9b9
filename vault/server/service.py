"""The running service's state: the open vault (steward), its thread, the export slots, the outbox."""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import re
import sys
import tempfile
from collections.abc import AsyncIterator, Callable
from pathlib import Path
from typing import Any, TypeVar

import vault
from vault.server.options import ServeOptions
from vault.server.outbox import Outbox
from vault.server.replies import ExportsBusy
from vault.server.worker import Worker

T = TypeVar("T")
POLICY_FILE_NAME = "[a-z0-9][a-z0-9_.-]{0,63}.toml"


class Service:
    def __init__(self, opened: vault.Vault, worker: Worker, options: ServeOptions) -> None:
        self.vault = opened
        self.worker = worker
        self.options = options
        self.outbox = Outbox(opened.path)
        self._export_slots = options.max_exports
        self._exports_running = 0

    async def call(self, token: str, client: str, operation: str,
                   fn: Callable[[vault.Vault], T]) -> T:
        """Authenticate the token (the library audits success and failure) and make one library
        call as its member, on the vault's thread."""
        return await self.worker.run(self.as_member, token, client, operation, fn)

    def as_member(self, token: str, client: str, operation: str, fn: Callable[[vault.Vault], T]) -> T:
        view = self.vault.authenticate(token, client=client, operation=operation)
        return fn(view)

    @contextlib.asynccontextmanager
    async def export_slot(self) -> AsyncIterator[None]:
        """At most --max-exports exports at a time; the next is told to come back (503)."""
        if self._exports_running >= self._export_slots:
            raise ExportsBusy(f"all {self._export_slots} export slots are in use; retry later")
        self._exports_running += 1
        try:
            yield
        finally:
            self._exports_running -= 1

    def export_into_outbox(self, view: vault.Vault, run: Callable[[Path], dict[str, Any]]) -> dict[str, Any]:
        """Run an export into a new outbox folder (vault thread); the result names its download."""
        folder = self.outbox.new_run()
        try:
            result = run(folder)
        except BaseException:
            self.outbox.discard(folder)
            raise
        final = self.outbox.publish(folder, result["export_id"], view.member)
        moved = {k: str(final) + v[len(str(folder)):] if isinstance(v, str) and v.startswith(str(folder))
                 else v for k, v in result.items()}  # the paths as they are now, in the outbox
        return {**moved, "archive": f"/v1/exports/{result['export_id']}/archive"}

    async def sweep_forever(self) -> None:
        """The scheduled sweep, on the vault's thread, as the steward who started the service
        (audited by the library like any sweep); a failure is one line on stderr."""
        hours = self.options.sweep_every_hours
        if hours <= 0:
            return
        while True:
            await asyncio.sleep(hours * 3600)
            try:
                result = await self.worker.run(self.vault.sweep)
                print(json.dumps({"sweep": {"erased": len(result.get("erased", []))}}), file=sys.stderr)
            except vault.VaultError as exc:
                print(f"mindward: scheduled sweep failed: {exc.message}", file=sys.stderr)

    async def expire_forever(self) -> None:
        while True:
            await asyncio.sleep(60)
            await asyncio.to_thread(self.outbox.expire)


def policy_folder(files: dict[str, str]) -> tempfile.TemporaryDirectory[str]:
    """The policy files of a request written to a private temporary folder (policy definitions
    only, never participant data)."""
    pattern = re.compile(POLICY_FILE_NAME)
    for name in files:
        if not pattern.fullmatch(name):
            raise vault.UsageError("policy file names are lowercase words ending in .toml")
    folder = tempfile.TemporaryDirectory(prefix="mindward-policy-")
    for name, text in files.items():
        path = Path(folder.name) / name
        with os.fdopen(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600), "w",
                       encoding="utf-8") as handle:
            handle.write(text)
    return folder
