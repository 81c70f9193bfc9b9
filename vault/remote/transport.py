"""One HTTP session with the service: the bearer token on every request, the service's error
bodies turned back into the library's errors, a lost connection into `Unreachable`."""

from __future__ import annotations

import ipaddress
import json
import ssl
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any
from urllib.parse import quote, urlsplit

import httpx

import vault
from vault.errors import (
    AuthenticationFailed,
    Conflict,
    IntegrityError,
    InvalidInput,
    NotFound,
    PolicyRefusal,
    StorageFull,
    Throttled,
    Unreachable,
    UsageError,
    VaultError,
)

PREFIX = "/v1"
# exit code in an error body -> the error it came from (1, a bug on the service, stays VaultError)
ERRORS: dict[int, type[VaultError]] = {
    cls.exit_code: cls for cls in (UsageError, AuthenticationFailed, PolicyRefusal, IntegrityError,
                                   NotFound, Conflict, InvalidInput, StorageFull, Throttled, Unreachable)
}
DEFAULT_TIMEOUT_S = 300.0  # an export of a large cohort is written before its answer comes
CONNECT_TIMEOUT_S = 10.0
MAX_JSON_BYTES = 64 * 2**20
LOOPBACK_NAMES = ("localhost",)


def check_url(url: str) -> str:
    """An http(s) service URL without path (or /v1, as `mindward serve` prints it), query or
    credentials; plain http only on this computer (a token sent in clear across a network is a
    token given away)."""
    parts = urlsplit(url.strip())
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise UsageError("a service URL looks like https://host:port", param="server")
    extra = parts.username or parts.password or parts.query or parts.fragment
    if extra or parts.path.rstrip("/") not in ("", PREFIX):
        raise UsageError("a service URL names only scheme, host and port", param="server")
    try:
        parts.port  # noqa: B018 (a port that is no number raises here, not deep in httpx)
    except ValueError:
        raise UsageError("a service URL's port is a number from 0 to 65535", param="server") from None
    if parts.scheme == "http" and not _loopback(parts.hostname):
        raise UsageError("plain http is for a service on this computer only; use https",
                         param="server")
    return f"{parts.scheme}://{parts.netloc}"


def _loopback(host: str) -> bool:
    if host.lower() in LOOPBACK_NAMES:
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def check_token(token: str | None) -> str:
    if not token:
        raise AuthenticationFailed("no token was given (a steward issues one: Vault.add_member, "
                                   "Vault.issue_token)", param="token")
    if not token.isascii() or not token.isprintable() or any(c.isspace() for c in token):
        raise AuthenticationFailed("authentication failed")  # never echo what was given
    return token


def tls_context(ca: str | Path | None) -> ssl.SSLContext | bool:
    """The system's trust store, or only the CA (or self-signed certificate) file given."""
    if ca is None:
        return True
    path = Path(ca)
    if not path.is_file():
        raise NotFound(f"no CA file at {path}", param="ca")
    try:
        return ssl.create_default_context(cafile=str(path))
    except (ssl.SSLError, ValueError) as exc:
        raise InvalidInput(f"{path} holds no certificate in PEM form", param="ca") from exc


class Session:
    """Requests to one service with one token; every failure is a VaultError."""

    def __init__(self, url: str, token: str, *, ca: str | Path | None = None,
                 timeout: float = DEFAULT_TIMEOUT_S) -> None:
        self.url = check_url(url)
        self._http = httpx.Client(
            base_url=self.url + PREFIX, verify=tls_context(ca), follow_redirects=False,
            timeout=httpx.Timeout(timeout, connect=min(timeout, CONNECT_TIMEOUT_S)),
            headers={"Authorization": f"Bearer {check_token(token)}",
                     "User-Agent": f"mindward/{vault.__version__}"})

    def close(self) -> None:
        self._http.close()

    def call(self, method: str, path: str, *, json_body: Any = None, params: dict[str, Any] | None = None,
             content: bytes | Iterable[bytes] | None = None, content_type: str | None = None,
             length: int | None = None) -> Any:
        """One request; the decoded JSON document of a success."""
        headers = {}
        if content_type is not None:
            headers["Content-Type"] = content_type
        if length is not None:
            headers["Content-Length"] = str(length)
        with self._guard():
            response = self._http.request(method, path, json=json_body, params=_params(params),
                                          content=content, headers=headers)
        return _document(response)

    def remove(self, path: str) -> Any:
        """An HTTP DELETE of `path`; the decoded JSON document of a success."""
        with self._guard():
            response = self._http.delete(path)
        return _document(response)

    @contextmanager
    def stream(self, path: str) -> Iterator[Iterator[bytes]]:
        """The body of a GET as chunks; a break in the middle raises Unreachable."""
        with self._guard(), self._http.stream("GET", path) as response:
            if response.status_code != 200:
                response.read()
                _document(response)
                raise Unreachable(f"the service answered {path} with HTTP {response.status_code}")
            yield self._chunks(response)

    def _chunks(self, response: httpx.Response) -> Iterator[bytes]:
        with self._guard():
            yield from response.iter_bytes()

    @contextmanager
    def _guard(self) -> Iterator[None]:
        try:
            yield
        except httpx.ConnectError as exc:
            why = _why(exc)
            raise Unreachable(f"cannot reach the service at {self.url} ({why})",
                              param="ca" if "certificate" in why else "server") from None
        except httpx.TimeoutException:
            raise Unreachable(f"the service at {self.url} did not answer in time") from None
        except (httpx.HTTPError, httpx.StreamError) as exc:
            raise Unreachable(f"the service at {self.url} broke off ({_why(exc)})") from None
        except httpx.InvalidURL:
            raise UsageError("the request names no valid URL (a participant or member id with "
                             "characters a URL cannot carry?)") from None


def _why(exc: Exception) -> str:
    text = str(exc)
    if "CERTIFICATE_VERIFY_FAILED" in text or "certificate" in text.lower():
        return "its TLS certificate is not trusted here: pass the lab's CA certificate file"
    return type(exc).__name__


def _params(params: dict[str, Any] | None) -> dict[str, str] | None:
    if not params:
        return None
    out = {}
    for key, value in params.items():
        if value is None:
            continue
        out[key] = ("true" if value else "false") if isinstance(value, bool) else str(value)
    return out


def segment(text: str) -> str:
    """A participant id, member name or request id as one path segment."""
    return quote(str(text), safe="")


def _document(response: httpx.Response) -> Any:
    if len(response.content) > MAX_JSON_BYTES:
        raise Unreachable("the service sent an answer larger than any mindward document")
    try:
        body = vault.load_json(response.content.decode("utf-8")) if response.content else None
    except (UnicodeDecodeError, ValueError):
        body = None
    if response.is_success and (body is not None or response.status_code == 204):
        return body
    raise error_of(response.status_code, body)


def error_of(status: int, body: Any) -> VaultError:
    """The library's error the service reported, with its message, hint and param."""
    if not (isinstance(body, dict) and isinstance(body.get("error"), str)
            and isinstance(body.get("exit_code"), int)):
        return Unreachable(f"the service answered HTTP {status} without a mindward document "
                           "(is the URL that of a mindward service?)")
    cls = ERRORS.get(body["exit_code"], VaultError)
    message = " ".join(body["error"].split()) or "the service refused the request"
    hint, param = body.get("hint"), body.get("param")
    return cls(message, hint=hint if isinstance(hint, str) else None,
               param=param if isinstance(param, str) else None)


def dumps(document: Any) -> str:
    return json.dumps(document, sort_keys=True)
