"""`mindward serve`: unlock the vault once, keep it open in this process, answer over HTTP(S).

The steward's passphrase unlocks the vault at start; the keys then live only in this process.
SIGTERM or SIGINT stops accepting requests, lets running ones finish, and closes the vault (which
signs a tree head over the session's entries)."""

from __future__ import annotations

import json
import signal
from collections.abc import Callable
from typing import Any

import vault
from vault.server.options import ServeOptions
from vault.server.worker import Worker


def serve(options: ServeOptions, passphrase: Callable[[], str],
          on_start: Callable[[dict[str, Any]], None]) -> None:
    """Serve until stopped. `passphrase` is asked only after the options are checked;
    `on_start` gets the start facts once the socket listens."""
    options.check()
    import uvicorn

    from vault.server.app import build_app
    from vault.server.service import Service

    secret = passphrase()
    worker = Worker()
    try:
        opened = worker.call(vault.Vault.open, options.vault, secret)
        del secret
        try:
            if not worker.call(lambda: opened.served):
                raise vault.UsageError("this vault is not set up to be served: its members still "
                                       "hold key slots", hint="serve-setup")
            service = Service(opened, worker, options)
            facts = worker.call(lambda: {**opened.info(), "sweep_every_hours": options.sweep_every_hours})
            config = uvicorn.Config(
                build_app(service), host=options.host, port=options.port,
                ssl_certfile=str(options.tls_cert) if options.tls_cert else None,
                ssl_keyfile=str(options.tls_key) if options.tls_key else None,
                # the peer's own address only: forwarded-for headers (which uvicorn trusts from
                # loopback by default) would let any local caller pick the address the throttle
                # counts and the audit log names
                proxy_headers=False, forwarded_allow_ips="",
                log_level="warning", access_log=False, server_header=False, lifespan="on",
                timeout_graceful_shutdown=30)
            _announcing(config, options, facts, on_start).run()
        finally:
            worker.call(opened.close)
    finally:
        worker.shutdown()


def start_facts(options: ServeOptions, facts: dict[str, Any], port: int) -> dict[str, Any]:
    host = f"[{options.host}]" if ":" in options.host else options.host
    return {"url": f"{'https' if options.tls else 'http'}://{host}:{port}/v1",
            "vault_id": facts["vault_id"], "fingerprint": facts["fingerprint"],
            "sweep_every_hours": options.sweep_every_hours, "tls": options.tls}


def start_line(start: dict[str, Any]) -> str:
    hours = start["sweep_every_hours"]
    sweep = (f"sweep every {hours:g} h (first {hours:g} h after start)" if hours > 0
             else "no scheduled sweep")
    return (f"mindward: serving vault {start['vault_id']} at {start['url']} (fingerprint "
            f"{start['fingerprint']}); {sweep}")


def start_json(start: dict[str, Any]) -> str:
    return json.dumps(start, sort_keys=True)


def _listening_port(server: Any, fallback: int) -> int:
    for listener in server.servers:
        for sock in listener.sockets:
            return int(sock.getsockname()[1])
    return fallback


def _announcing(config: Any, options: ServeOptions, facts: dict[str, Any],
                on_start: Callable[[dict[str, Any]], None]) -> Any:
    """uvicorn's server, telling `on_start` once it listens (the real port when 0 was asked)."""
    import uvicorn

    class Announcing(uvicorn.Server):
        def handle_exit(self, sig: int, frame: Any) -> None:
            """Stop gracefully and return (uvicorn would raise the signal again afterwards, killing
            the process before the vault is closed and its session's head signed)."""
            if self.should_exit and sig == signal.SIGINT:
                self.force_exit = True  # a second Ctrl-C: stop waiting for requests
            self.should_exit = True

        async def startup(self, sockets: Any = None) -> None:
            await super().startup(sockets=sockets)
            if self.started:
                on_start(start_facts(options, facts, _listening_port(self, options.port)))

    return Announcing(config)
