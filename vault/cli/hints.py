"""The library's errors in command-line terms: the option behind a parameter, the command
behind a next step (VaultError.param and VaultError.hint; vault/errors.py lists the hints)."""

from __future__ import annotations

from vault.errors import VaultError

# VaultError.hint -> what the command line tells the user to do
COMMANDS: dict[str, str] = {
    "create": "create one with 'mindward init'",
    "enrol": "as 'mindward enrol' printed",
    "verify-audit": "run 'mindward audit verify'",
    "amend-consent": "use 'mindward consent amend'",
    "key-free-checks": "use 'mindward audit show', 'audit verify' and the other key-free checks",
    "public-key": "see 'mindward info'; pass it with --key",
    "withdraw-request": "record one with 'mindward withdraw request'",
    "withdraw-receipt": "see 'mindward withdraw receipt'",
    "check-export": "check it with 'mindward export check'",
    "serve-setup": "run 'mindward serve-setup' first",
}

# VaultError.param (an argument of a library call) -> the option that sets it
OPTIONS: dict[str, str] = {
    "ca": "MINDWARD_CA",
    "epsilons": "--epsilons",
    "expires_days": "--expires-days",
    "event_codes": "--event-codes",
    "items": "--items",
    "host": "--host",
    "kind": "--kind",
    "max_exports": "--max-exports",
    "max_upload_mb": "--max-upload-mb",
    "mechanism": "--mechanism",
    "port": "--port",
    "public_key": "--key",
    "received": "--received",
    "passphrase": "MINDWARD_NEW_PASSPHRASE",
    "out": "--out",
    "release": "--release",
    "role": "--role",
    "scope": "--scope",
    "server": "--server",
    "sidecar": "--sidecar",
    "token": "MINDWARD_TOKEN",
    "sweep_every_hours": "--sweep-every-hours",
    "tls_cert": "--tls-cert",
    "unit": "--unit",
}


def cli_message(exc: VaultError) -> str:
    """The error's message, led by the option at fault and followed by the command to run."""
    text = exc.message
    flag = OPTIONS.get(getattr(exc, "param", None) or "")
    if flag and not text.startswith(flag):
        text = f"{flag}: {text}"
    step = COMMANDS.get(getattr(exc, "hint", None) or "")
    return f"{text} ({step})" if step else text
