"""A remote upload or export killed mid-way: the client says so with exit 11 and keeps nothing.

A remote export is either a finished, verified folder at --out or nothing: the service killed
(SIGKILL) in the middle of the download, or a byte of the archive changed on the way, leaves no
`out` and no staging folder, and the CLI exits with a documented code in one line."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tests.remote.conftest import SERVICE_PASSPHRASE, KillingProxy, make_served_twin, start_server
from vault.cli.app import main

EXPORT = ["export", "eeg", "--purpose", "method-development", "--json"]


def _run(argv: list[str], url: str, token: str, monkeypatch, capsys) -> tuple[int, str, str]:
    monkeypatch.delenv("MINDWARD_VAULT", raising=False)
    monkeypatch.setenv("MINDWARD_SERVER", url)
    monkeypatch.setenv("MINDWARD_TOKEN", token)
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def _leftovers(parent: Path, name: str) -> list[str]:
    return sorted(p.name for p in parent.iterdir() if p.name.startswith(f".{name}"))


@pytest.fixture
def fresh_service(lab_files, tmp_path: Path):
    """A served twin of its own with a running service (the test kills it)."""
    tokens = make_served_twin(Path(lab_files["root"]) / "base", tmp_path / "served")
    server = start_server(tmp_path / "served")
    try:
        yield server, tokens, tmp_path / "served"
    finally:
        server.stop()


@pytest.mark.parametrize("after", [600, 9000])
def test_service_killed_mid_download_leaves_no_export(fresh_service, after: int, tmp_path: Path,
                                                      monkeypatch, capsys) -> None:
    server, tokens, served = fresh_service
    proxy = KillingProxy(server.url, server, after=after)
    try:
        out = tmp_path / "got" / "eeg"
        code, stdout, err = _run([*EXPORT, "--out", str(out)], proxy.url, tokens["omar"],
                                 monkeypatch, capsys)
    finally:
        proxy.close()
    assert proxy.killed_after == after and server.proc.poll() is not None  # it did die mid-way
    assert code == 11, err
    assert json.loads(stdout)["exit_code"] == 11 and err.count("\n") == 1 and "Traceback" not in err
    assert "export" in err and "nothing was written" in err
    assert not out.exists() and _leftovers(out.parent, out.name) == []
    from vault import Vault

    with Vault.open(served, SERVICE_PASSPHRASE) as v:  # the vault opens and verifies after the kill
        assert v.verify()["ok"]


def test_a_changed_byte_in_the_archive_fails_verification(fresh_service, tmp_path: Path,
                                                          monkeypatch, capsys) -> None:
    server, tokens, _ = fresh_service
    proxy = KillingProxy(server.url, server, after=None, flip_after=b'"Name"')
    try:
        out = tmp_path / "got" / "eeg"
        code, _stdout, err = _run([*EXPORT, "--out", str(out)], proxy.url, tokens["omar"],
                                 monkeypatch, capsys)
    finally:
        proxy.close()
    assert proxy.flipped, "the proxy found no byte to change"
    assert code == 5, err
    assert not out.exists() and _leftovers(out.parent, out.name) == []


def test_an_untouched_download_is_the_exported_folder(fresh_service, tmp_path: Path, monkeypatch,
                                                      capsys) -> None:
    """The control for the two above: through the same proxy, with nothing done to the bytes,
    the export arrives and `export verify` accepts it with the key from `info`."""
    server, tokens, _ = fresh_service
    proxy = KillingProxy(server.url, server, after=None)
    try:
        out = tmp_path / "got" / "eeg"
        code, stdout, err = _run([*EXPORT, "--out", str(out)], proxy.url, tokens["omar"],
                                 monkeypatch, capsys)
        assert code == 0, err
        key = json.loads(_run(["info", "--json"], proxy.url, tokens["omar"], monkeypatch, capsys)[1])
    finally:
        proxy.close()
    assert json.loads(stdout)["out"] == str(out) and (out / "manifest.json").is_file()
    assert main(["export", "verify", str(out), "--key", key["public_key"]]) == 0
    assert _leftovers(out.parent, out.name) == []


def test_a_service_signing_with_another_key_than_yours_gets_no_request(fresh_service, tmp_path: Path,
                                                                       monkeypatch, capsys) -> None:
    """MINDWARD_KEY is the vault's key as you hold it: a service with another key (not your vault's,
    or a swapped one) is refused before any export is asked of it; the right key works."""
    server, tokens, served = fresh_service
    out = tmp_path / "eeg"
    monkeypatch.setenv("MINDWARD_KEY", "ab" * 32)
    code, _, err = _run([*EXPORT, "--out", str(out)], server.url, tokens["omar"], monkeypatch, capsys)
    assert code == 5 and "another key" in err and not out.exists()
    from vault import describe

    monkeypatch.setenv("MINDWARD_KEY", describe(served)["public_key"])
    code, _, err = _run([*EXPORT, "--out", str(out)], server.url, tokens["omar"], monkeypatch, capsys)
    assert code == 0, err


def test_service_killed_mid_upload_is_exit_11_and_stores_nothing(fresh_service, lab_files,
                                                                  monkeypatch, capsys) -> None:
    from vault import Vault, describe

    server, tokens, served = fresh_service
    blobs_before = describe(served)["blobs"]
    proxy = KillingProxy(server.url, server, after=None, upload_after=200_000)
    try:
        code, stdout, err = _run(["ingest", "eeg", lab_files["pid1"], lab_files["edf"], "--json"],
                                 proxy.url, tokens["steward"], monkeypatch, capsys)
    finally:
        proxy.close()
    assert proxy.killed_after == 200_000 and server.proc.wait(timeout=60) is not None
    assert code == 11 and json.loads(stdout)["exit_code"] == 11 and err.count("\n") == 1
    assert describe(served)["blobs"] == blobs_before  # nothing of the half upload was stored
    with Vault.open(served, SERVICE_PASSPHRASE) as v:
        assert v.verify()["ok"]
