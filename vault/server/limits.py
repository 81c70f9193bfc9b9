"""Request bodies bounded while they arrive (an ASGI middleware): a body announced or found to be
over its route's limit is answered 413 without reading the rest."""

from __future__ import annotations

import json
from collections.abc import Awaitable, Callable
from typing import Any

from vault.server.options import JSON_LIMIT, SCORES_LIMIT
from vault.server.replies import BodyTooLarge, error_body, of_error

Scope = dict[str, Any]
Message = dict[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
App = Callable[[Scope, Receive, Send], Awaitable[None]]


def limit_for(path: str, upload_limit: int) -> int:
    if path.startswith("/v1/ingest/eeg/"):
        return upload_limit
    if path == "/v1/ingest/scores":
        return SCORES_LIMIT
    return JSON_LIMIT


def too_large(limit: int) -> BodyTooLarge:
    return BodyTooLarge(f"the request body is larger than this endpoint's limit of {limit} bytes; "
                        "nothing was stored")


class BodyLimit:
    def __init__(self, app: App, upload_limit: int) -> None:
        self.app = app
        self.upload_limit = upload_limit

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        limit = limit_for(scope["path"], self.upload_limit)
        announced = _content_length(scope)
        if announced is not None and announced > limit:
            await _reply_413(send, too_large(limit))
            return
        seen = 0
        started = False

        async def counted() -> Message:
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > limit:
                    raise too_large(limit)
            return message

        async def watched(message: Message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, counted, watched)
        except BodyTooLarge as exc:  # raised where nothing caught it (a body read by the framework)
            if started:
                raise
            await _reply_413(send, exc)


def _content_length(scope: Scope) -> int | None:
    for name, value in scope.get("headers", []):
        if name == b"content-length":
            text = value.decode("latin-1").strip()
            return int(text) if text.isdigit() else None
    return None


async def _reply_413(send: Send, exc: BodyTooLarge) -> None:
    body = json.dumps(of_error(exc) if exc else error_body("too large", 8)).encode()
    await send({"type": "http.response.start", "status": 413,
                "headers": [(b"content-type", b"application/json"),
                            (b"content-length", str(len(body)).encode()),
                            (b"connection", b"close")]})
    await send({"type": "http.response.body", "body": body})
