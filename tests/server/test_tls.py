"""TLS: a certificate and key the test makes (the `cryptography` package, as a lab would with
openssl), served with --tls-cert/--tls-key; a client that trusts it talks, one that does not is
refused by its own verification, and plain HTTP gets no answer from the vault."""

from __future__ import annotations

import datetime as dt
import ipaddress
import ssl
from pathlib import Path

import httpx
import pytest


def make_certificate(folder: Path) -> tuple[Path, Path]:
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "mindward test service")])
    now = dt.datetime.now(dt.UTC)
    cert = (x509.CertificateBuilder().subject_name(name).issuer_name(name)
            .public_key(key.public_key()).serial_number(x509.random_serial_number())
            .not_valid_before(now - dt.timedelta(minutes=5)).not_valid_after(now + dt.timedelta(days=1))
            .add_extension(x509.SubjectAlternativeName([
                x509.IPAddress(ipaddress.ip_address("127.0.0.1")), x509.DNSName("localhost")]),
                critical=False)
            .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
            .sign(key, hashes.SHA256()))
    cert_path, key_path = folder / "service.crt", folder / "service.key"
    cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    key_path.write_bytes(key.private_bytes(serialization.Encoding.PEM,
                                           serialization.PrivateFormat.PKCS8,
                                           serialization.NoEncryption()))
    key_path.chmod(0o600)
    return cert_path, key_path


def test_the_service_over_tls(lab, serve, tmp_path: Path) -> None:
    cert, key = make_certificate(tmp_path)
    running = serve(lab.vault, "--tls-cert", str(cert), "--tls-key", str(key))
    assert running.url.startswith("https://127.0.0.1:") and running.start["tls"] is True
    trusting = ssl.create_default_context(cafile=str(cert))
    with running.client(lab.tokens["auditor"], verify=trusting) as http:
        info = http.get("/v1/info")
        assert info.status_code == 200 and info.json()["role"] == "auditor"
    with running.client(lab.tokens["auditor"]) as http, pytest.raises(httpx.ConnectError):
        http.get("/v1/info")  # the system store does not know this certificate
    plain = running.origin.replace("https://", "http://")
    with httpx.Client(base_url=plain, timeout=60) as http, pytest.raises(httpx.HTTPError):
        r = http.get("/v1/health")
        if r.status_code >= 400:
            raise httpx.HTTPError("refused")
