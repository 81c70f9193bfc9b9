"""What `serve` is started with, checked before the vault is unlocked."""

from __future__ import annotations

import ipaddress
import os
import stat
from dataclasses import dataclass
from pathlib import Path

from vault.errors import AuthenticationFailed, UsageError

DEFAULT_PORT = 8631
MIB = 1024 * 1024
JSON_LIMIT = 1 * MIB  # JSON bodies and consent forms
SCORES_LIMIT = 64 * MIB  # a scores CSV


@dataclass(frozen=True)
class ServeOptions:
    vault: Path
    host: str = "127.0.0.1"
    port: int = DEFAULT_PORT
    tls_cert: Path | None = None
    tls_key: Path | None = None
    max_exports: int = 2
    max_upload_mb: int = 4096
    sweep_every_hours: float = 24.0

    @property
    def tls(self) -> bool:
        return self.tls_cert is not None

    @property
    def upload_limit(self) -> int:
        return self.max_upload_mb * MIB

    def check(self) -> None:
        """Refuse what would expose the vault: a non-loopback address without TLS, half a TLS
        pair, limits that make no sense."""
        if (self.tls_cert is None) != (self.tls_key is None):
            raise UsageError("TLS needs both a certificate and its key", param="tls_cert")
        for path in (self.tls_cert, self.tls_key):
            if path is not None and not Path(path).is_file():
                raise UsageError(f"cannot read {path}", param="tls_cert")
        if not self.tls and not is_loopback(self.host):
            raise UsageError(f"refusing to serve on {self.host} without TLS: only loopback "
                             "addresses may be served in clear", param="host")
        if not 0 <= self.port <= 65535:
            raise UsageError("a port is a number from 0 to 65535", param="port")
        if self.max_exports < 1:
            raise UsageError("at least one export must be allowed at a time", param="max_exports")
        if self.max_upload_mb < 1:
            raise UsageError("the upload limit is at least 1 MiB", param="max_upload_mb")
        if self.sweep_every_hours < 0:
            raise UsageError("the sweep interval is 0 (never) or a number of hours",
                             param="sweep_every_hours")


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False  # a host name: it may resolve to anything


def read_credentials(path: Path) -> str:
    """The steward's passphrase from a file only this user can read (the first line)."""
    path = Path(path)
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
    except OSError as exc:
        raise AuthenticationFailed(f"cannot read the credentials file {path}") from exc
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise AuthenticationFailed(f"the credentials file {path} is not a regular file")
        if info.st_uid != os.getuid() or info.st_mode & 0o077:
            raise AuthenticationFailed(
                f"the credentials file {path} must belong to this user and be readable by it alone "
                "(chmod 600)")
        with os.fdopen(fd, "rb", closefd=False) as handle:
            raw = handle.read(64 * 1024)
    finally:
        os.close(fd)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise AuthenticationFailed(f"the credentials file {path} is not UTF-8 text") from None
    lines = text.splitlines()
    if not lines or not lines[0]:
        raise AuthenticationFailed(f"the credentials file {path} holds no passphrase")
    return lines[0]
