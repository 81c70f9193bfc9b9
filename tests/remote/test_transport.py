"""The client's side of the wire, without a service: what it refuses to send, and how the
service's error bodies and a lost connection come back (the real service: test_same_cli.py)."""

from __future__ import annotations

import json
import socket

import httpx
import pytest
from hypothesis import given
from hypothesis import strategies as st

import vault
from vault.cli.app import main
from vault.errors import EXIT_CODES
from vault.remote import transport
from vault.remote.transport import Session, check_token, check_url, error_of

KNOWN = sorted(c for c in EXIT_CODES if c not in (0, 1, 11))


def _session(handler) -> Session:
    session = Session("http://127.0.0.1:9", "mwt1-" + "0" * 16 + "-" + "1" * 64)
    session._http = httpx.Client(base_url=session.url + transport.PREFIX,
                                 transport=httpx.MockTransport(handler),
                                 headers=session._http.headers)
    return session


@pytest.mark.parametrize("code", KNOWN)
def test_each_error_body_becomes_the_same_error_with_its_hint_and_param(code: int) -> None:
    body = {"error": "participant p-x: no such id", "exit_code": code, "hint": "enrol", "param": "kind"}
    session = _session(lambda request: httpx.Response(400, json=body))
    with pytest.raises(vault.VaultError) as caught:
        session.call("GET", "/info")
    assert type(caught.value).exit_code == code
    assert (caught.value.message, caught.value.hint, caught.value.param) == (
        "participant p-x: no such id", "enrol", "kind")


def test_a_bug_on_the_service_stays_exit_1() -> None:
    error = error_of(500, {"error": "internal error (KeyError)", "exit_code": 1})
    assert type(error) is vault.VaultError and error.exit_code == 1


@pytest.mark.parametrize("body", [None, "<html>bad gateway</html>", {"detail": "x"},
                                  {"error": 3, "exit_code": 4}, {"error": "x", "exit_code": "4"}])
def test_an_answer_that_is_no_mindward_error_is_unreachable(body) -> None:
    content = body.encode() if isinstance(body, str) else json.dumps(body).encode() if body else b""
    session = _session(lambda request: httpx.Response(502, content=content))
    with pytest.raises(vault.Unreachable):
        session.call("GET", "/info")


@given(st.text(max_size=300))
def test_an_error_message_is_one_line_whatever_the_service_sends(text: str) -> None:
    error = error_of(400, {"error": text, "exit_code": 8})
    assert "\n" not in error.message and "\r" not in error.message


def test_the_token_travels_only_as_a_bearer_header() -> None:
    seen = []

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        return httpx.Response(200, json={"ok": True})

    _session(handler).call("GET", "/budget", params={"purpose": "p", "none": None, "flag": True})
    (request,) = seen
    assert request.headers["authorization"] == "Bearer mwt1-" + "0" * 16 + "-" + "1" * 64
    assert "mwt1" not in str(request.url)
    assert dict(request.url.params) == {"purpose": "p", "flag": "true"}


def test_a_redirect_is_not_followed() -> None:
    session = _session(lambda request: httpx.Response(307, headers={"location": "http://elsewhere/"}))
    with pytest.raises(vault.Unreachable):
        session.call("GET", "/info")


@pytest.mark.parametrize("url", ["http://192.0.2.10:8631", "http://lab.example:80", "ftp://127.0.0.1",
                                 "https://user:pw@lab.example", "https://lab.example/api",
                                 "https://lab.example?x=1", "127.0.0.1:8631", "", "https://lab.example:port",
                                 "https://lab.example:99999"])
def test_urls_that_would_leak_the_token_or_mean_something_else_are_refused(url: str) -> None:
    with pytest.raises(vault.UsageError):
        check_url(url)


@pytest.mark.parametrize("url", ["http://127.0.0.1:8631", "http://localhost:1", "http://[::1]:2",
                                 "https://lab.example", "https://lab.example:8631/"])
def test_loopback_http_and_any_https_are_accepted(url: str) -> None:
    assert check_url(url) == url.rstrip("/")
    assert check_url(url.rstrip("/") + "/v1") == url.rstrip("/")  # as `mindward serve` prints it


@pytest.mark.parametrize("token", ["", None, "mwt1-a\nX-Other: 1", "tok en", "tökén"])
def test_a_token_that_cannot_be_a_header_is_refused_before_sending(token) -> None:
    with pytest.raises(vault.AuthenticationFailed) as caught:
        check_token(token)
    assert token is None or not token or token not in caught.value.message


def _closed_port() -> int:
    with socket.socket() as s:  # bound then closed: nothing listens there
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_the_cli_says_in_one_line_that_the_service_cannot_be_reached(monkeypatch, capsys) -> None:
    monkeypatch.setenv("MINDWARD_TOKEN", "mwt1-" + "0" * 16 + "-" + "1" * 64)
    code = main(["budget", "--server", f"http://127.0.0.1:{_closed_port()}", "--json"])
    out, err = capsys.readouterr()
    assert code == vault.Unreachable.exit_code == 11
    assert json.loads(out)["exit_code"] == 11 and err.count("\n") == 1 and "Traceback" not in err


def test_the_cli_refuses_a_missing_token(monkeypatch, capsys) -> None:
    monkeypatch.delenv("MINDWARD_TOKEN", raising=False)
    assert main(["member", "list", "--server", "http://127.0.0.1:9"]) == 3
    assert "MINDWARD_TOKEN" in capsys.readouterr().err


def test_neither_vault_nor_server_is_one_usage_line(monkeypatch, capsys) -> None:
    for name in ("MINDWARD_VAULT", "MINDWARD_SERVER"):
        monkeypatch.delenv(name, raising=False)
    assert main(["budget", "--json"]) == 2
    out, err = capsys.readouterr()
    assert "--server" in json.loads(out)["error"] and err.count("\n") == 1


@pytest.mark.parametrize("argv", [["init", "--vault", "x"], ["rekey", "--vault", "x"]])
def test_commands_on_the_vaults_own_files_refuse_a_server(argv, monkeypatch, capsys, tmp_path) -> None:
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("MINDWARD_SERVER", "http://127.0.0.1:9")
    monkeypatch.setenv("MINDWARD_PASSPHRASE", "correct horse battery staple")
    assert main(argv) == 2
    assert "MINDWARD_SERVER" in capsys.readouterr().err
    assert not (tmp_path / "x").exists()


@pytest.mark.parametrize("argv", [["serve", "--vault", "x", "--server", "http://127.0.0.1:9"],
                                  ["demo", "--server", "http://127.0.0.1:9"]])
def test_serve_and_demo_take_no_server_option(argv, capsys) -> None:
    assert main(argv) == 2
    assert capsys.readouterr().err.count("\n") == 1
