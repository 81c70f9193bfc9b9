"""The CLI against a service over TLS, with a certificate the test makes (the service tests'
maker): trusted through MINDWARD_CA it answers; without it the client refuses the connection
(exit 11, naming the certificate) and never sends the token in clear instead."""

from __future__ import annotations

import json
from pathlib import Path

from tests.remote.conftest import make_served_twin, start_server
from tests.server.test_tls import make_certificate
from vault.cli.app import main


def _run(argv: list[str], env: dict[str, str], monkeypatch, capsys) -> tuple[int, str, str]:
    for name in ("MINDWARD_VAULT", "MINDWARD_CA", "MINDWARD_KEY"):
        monkeypatch.delenv(name, raising=False)
    for name, value in env.items():
        monkeypatch.setenv(name, value)
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_the_cli_over_tls_trusts_only_the_ca_it_is_given(lab_files, tmp_path: Path, monkeypatch,
                                                        capsys) -> None:
    tokens = make_served_twin(Path(lab_files["root"]) / "base", tmp_path / "served")
    cert, key = make_certificate(tmp_path)
    running = start_server(tmp_path / "served", "--tls-cert", str(cert), "--tls-key", str(key))
    try:
        env = {"MINDWARD_SERVER": running.url, "MINDWARD_TOKEN": tokens["ines"]}
        code, out, err = _run(["audit", "show", "--limit", "2", "--json"],
                              {**env, "MINDWARD_CA": str(cert)}, monkeypatch, capsys)
        assert code == 0, err
        assert [e["seq"] for e in json.loads(out)] == [0, 1]
        code, out, err = _run(["audit", "show", "--json"], env, monkeypatch, capsys)
        assert code == 11 and "certificate" in err and err.count("\n") == 1
        plain = running.url.replace("https://", "http://")
        code, out, err = _run(["audit", "show", "--json"], {**env, "MINDWARD_SERVER": plain},
                              monkeypatch, capsys)
        assert code == 11  # the service speaks TLS only; the client gets no mindward answer
        code, _, err = _run(["audit", "show"], {**env, "MINDWARD_CA": str(tmp_path / "none.pem")},
                            monkeypatch, capsys)
        assert code == 6 and "MINDWARD_CA" in err
    finally:
        running.stop()
