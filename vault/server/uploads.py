"""A request body as the sequential stream the library reads (`.read(n)`), fed from the event loop
while the vault's thread consumes it: a bounded queue, so a recording never sits in memory whole."""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import AsyncIterator
from concurrent.futures import Future
from typing import Any

from vault.errors import InvalidInput, VaultError

QUEUE_CHUNKS = 16
IDLE_S = 60.0  # an upload that sends nothing for this long is dropped (it holds the vault's thread)
_END = b""


class BodyStream:
    """Read on the vault's thread; each chunk is fetched from the event loop's queue."""

    def __init__(self, loop: asyncio.AbstractEventLoop, size: int) -> None:
        self._loop = loop
        self._queue: asyncio.Queue[bytes | BaseException] = asyncio.Queue(QUEUE_CHUNKS)
        self._buffer = bytearray()
        self._ended = False
        self.size = size

    def read(self, n: int = -1) -> bytes:
        while not self._ended and (n < 0 or len(self._buffer) < n):
            pending = asyncio.run_coroutine_threadsafe(self._queue.get(), self._loop)
            try:
                item = pending.result(timeout=IDLE_S)
            except TimeoutError:
                pending.cancel()
                self._ended = True
                raise InvalidInput("the upload stalled; nothing was stored") from None
            if isinstance(item, BaseException):
                self._ended = True
                raise item
            if item == _END:
                self._ended = True
            else:
                self._buffer += item
        if n < 0:
            n = len(self._buffer)
        out = bytes(self._buffer[:n])
        del self._buffer[:n]
        return out

    async def feed(self, chunks: AsyncIterator[bytes], work: Future[Any]) -> None:
        """Pass the body on; a body shorter or longer than announced is refused (nothing stored)."""
        seen = 0
        try:
            async for chunk in chunks:
                if chunk:
                    seen += len(chunk)
                    if seen > self.size:
                        raise InvalidInput("the upload is longer than its Content-Length")
                    await self._queue.put(chunk)
            if seen != self.size:
                raise InvalidInput("the upload broke off before its Content-Length; nothing was stored")
        except VaultError as exc:  # a body limit, or a length that does not match
            await self._fail(exc, work)
            raise
        except Exception as exc:  # the client went away mid-way
            failure = InvalidInput("the upload broke off before its Content-Length; nothing was stored")
            await self._fail(failure, work)
            raise failure from exc
        except BaseException:  # cancelled: the work is over already
            await self._fail(InvalidInput("the upload was aborted"), work)
            raise
        await self._queue.put(_END)

    async def _fail(self, failure: Exception, work: Future[Any]) -> None:
        """Tell the reader (the library, on the vault's thread) that the body failed."""
        if work.done():  # nobody reads any more
            with contextlib.suppress(asyncio.QueueFull):
                self._queue.put_nowait(failure)
        else:
            await self._queue.put(failure)


async def stream_into(work: Future[Any], stream: BodyStream, chunks: AsyncIterator[bytes]) -> Any:
    """Feed `chunks` to `stream` while `work` (running on the vault's thread) reads it; the first
    failure wins: a broken body fails the work, a failed work stops the feeding."""
    done = asyncio.wrap_future(work)
    feeder = asyncio.ensure_future(stream.feed(chunks, work))
    await asyncio.wait({done, feeder}, return_when=asyncio.FIRST_COMPLETED)
    if done.done() and not feeder.done():
        feeder.cancel()
    try:
        await feeder
    except asyncio.CancelledError:
        pass
    except Exception:
        await asyncio.wait({done})
        done.exception()  # the work failed because its body did: the body's error is the answer
        raise
    return await done
