"""One thread owns the open vault: every Vault call of the service runs on it (the vault's SQLite
connection belongs to the thread that opened it), one call at a time."""

from __future__ import annotations

import asyncio
import functools
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any, TypeVar

T = TypeVar("T")


class Worker:
    def __init__(self) -> None:
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="mindward-vault")

    def call(self, fn: Callable[..., T], *args: Any) -> T:
        """Run `fn` on the vault's thread and wait (from a thread that is not the event loop)."""
        return self._pool.submit(fn, *args).result()

    def submit(self, fn: Callable[..., T], *args: Any) -> Future[T]:
        return self._pool.submit(fn, *args)

    async def run(self, fn: Callable[..., T], *args: Any) -> T:
        """Run `fn` on the vault's thread from the event loop, without blocking it."""
        loop = asyncio.get_running_loop()
        return await loop.run_in_executor(self._pool, functools.partial(fn, *args))

    def shutdown(self) -> None:
        self._pool.shutdown(wait=True)
