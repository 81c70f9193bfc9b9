"""The role x endpoint matrix against a live service: every endpoint with no token, an expired, a
revoked and two forged tokens, and the roles the library refuses; only the right token succeeds,
and every refusal is in the audit log (failed authentications with the client's address and never
the token; role refusals under the member's name).

(The roles each endpoint allows are the library's decisions, the same as in local use:
tests/cli/test_role_matrix.py.)"""

from __future__ import annotations

import datetime as dt
import itertools
import json
from pathlib import Path
from typing import Any

from tests.conftest import ROOT, TEST_PASSPHRASE
from tests.server.conftest import EXAMPLES, edf_file, error_of, form

ALL = {"steward", "analyst", "auditor"}
DATA = {"steward", "analyst"}
STEWARD = {"steward"}
AUDIT = {"steward", "auditor"}
BAD_TOKENS = ("none", "expired", "revoked", "forged", "forged-secret")


def _policy_files() -> dict[str, str]:
    return {p.name: p.read_text() for p in sorted((ROOT / "policies").glob("*.toml"))}


def _endpoints(lab: Any) -> list[tuple[str, str, dict[str, Any], set[str]]]:
    """(method, path, request keywords, roles that succeed), in the order the steward's happy path
    needs (enrol before consent, export before its check, request before process)."""
    pid, pid1, pid2, pid3 = lab.pids[:4]
    today = dt.datetime.now(dt.UTC).date().isoformat()
    items = [f"dish-{j:02d}" for j in range(4)]
    amend = (EXAMPLES / "amend-withdraw-recommender.toml").read_text().replace(
        'code = "TL-', 'code = "m1-', 1)
    toml = {"headers": {"Content-Type": "application/toml"}}
    return [
        ("GET", "/v1/info", {}, ALL),
        ("POST", "/v1/access/check", {"json": {"purpose": "primary-analysis",
                                               "categories": ["eeg-raw"]}}, DATA),
        ("GET", "/v1/budget", {}, ALL),
        ("GET", "/v1/policy", {}, ALL),
        ("GET", "/v1/audit/entries", {"params": {"limit": 5}}, AUDIT),
        ("GET", "/v1/audit/head", {}, ALL),
        ("GET", "/v1/audit/proof/0", {}, ALL),
        ("GET", "/v1/audit/verify", {}, ALL),
        ("POST", "/v1/audit/consistency", {"json": {"head": "LATEST_HEAD"}}, ALL),
        ("POST", "/v1/audit/head", {}, STEWARD),
        ("POST", "/v1/verify", {}, STEWARD),
        ("GET", "/v1/members", {}, ALL),
        ("POST", "/v1/members", {"json": {"name": "newcomer", "role": "analyst"}}, STEWARD),
        ("POST", "/v1/members/newcomer/token", {"json": {"expires_days": 2}}, STEWARD),
        ("POST", "/v1/members/newcomer/revoke", {}, STEWARD),
        ("POST", "/v1/members", {"json": {"name": "leaver", "role": "auditor"}}, STEWARD),
        ("DELETE", "/v1/members/leaver", {}, STEWARD),
        ("POST", "/v1/enrol", {"content": form("new").encode(), **toml}, STEWARD),
        ("GET", f"/v1/consent/{pid}", {}, STEWARD),
        ("POST", f"/v1/consent/{pid1}", {"content": amend.encode(), **toml}, STEWARD),
        ("POST", f"/v1/ingest/eeg/{pid3}", {"content": edf_file().read_bytes(),
                                            "headers": {"Content-Type": "application/octet-stream"}},
         STEWARD),
        ("POST", "/v1/ingest/scores", {"params": {"kind": "explicit"},
                                       "content": (lab.root / "ratings.csv").read_bytes(),
                                       "headers": {"Content-Type": "text/csv"}}, STEWARD),
        ("POST", "/v1/exports/eeg", {"json": {"purpose": "method-development"}}, DATA),
        ("POST", "/v1/exports/matrix", {"json": {
            "purpose": "recommender-training", "category": "ratings-explicit", "epsilon": 0.5,
            "items": items}}, DATA),
        ("POST", "/v1/exports/check", {"json": {"document": "LAST_MANIFEST"}}, ALL),
        ("POST", "/v1/policy", {"json": {"files": _policy_files()}}, STEWARD),
        ("POST", "/v1/withdrawals", {"json": {"participant": pid2, "received": today}}, STEWARD),
        ("GET", "/v1/withdrawals", {}, STEWARD),
        ("POST", f"/v1/withdrawals/{pid2}/process", {}, STEWARD),
        ("GET", f"/v1/withdrawals/{pid2}/receipt", {}, STEWARD),
        ("POST", "/v1/sweep", {"json": {"dry_run": True}}, STEWARD),
        ("GET", "/v1/report", {}, STEWARD),
    ]


def _bad_token(kind: str, tokens: dict[str, str]) -> str | None:
    real = tokens["analyst"]
    return {"none": None, "expired": tokens["expired"], "revoked": tokens["revoked"],
            "forged": "mwt1-" + "0123456789abcdef" + "ab" * 32,
            # a real token's id with one digit of its secret changed
            "forged-secret": real[:-1] + ("0" if real[-1] != "0" else "1")}[kind]


def _fill(kw: dict[str, Any], state: dict[str, Any]) -> dict[str, Any]:
    body = kw.get("json")
    if isinstance(body, dict) and body.get("head") == "LATEST_HEAD":
        return {**kw, "json": {"head": state["head"]}}
    if isinstance(body, dict) and body.get("document") == "LAST_MANIFEST":
        return {**kw, "json": {"document": state["manifest"]}}
    return kw


def test_every_endpoint_by_every_kind_of_caller(lab, serve) -> None:
    from vault import Vault, verify_audit

    running = serve(lab.vault)
    sources = (f"127.0.0.{n}" for n in itertools.count(2))
    refused_from: dict[str, tuple[str, str]] = {}  # source address -> (endpoint, bad token kind)
    role_refusals: dict[str, int] = {"omar": 0, "ines": 0}
    state: dict[str, Any] = {}
    with running.client(lab.tokens["steward"]) as steward:
        state["head"] = steward.get("/v1/audit/head").json()
    for method, path, kw, allowed in _endpoints(lab):
        kw = _fill(kw, state)
        for kind in BAD_TOKENS:
            source = next(sources)
            with running.client(_bad_token(kind, lab.tokens), source=source) as http:
                response = http.request(method, path, **kw)
            assert response.status_code == 401, f"{method} {path} with {kind}: {response.text}"
            assert error_of(response)["exit_code"] == 3
            assert response.json()["error"] == "authentication failed"  # one opaque message
            refused_from[source] = (path, kind)
        for role, member in (("analyst", "omar"), ("auditor", "ines")):
            if role in allowed:
                continue
            with running.client(lab.tokens[role]) as http:
                response = http.request(method, path, **kw)
            if path == "/v1/access/check":  # the decision is the document (the CLI exits 4 on it)
                assert response.status_code == 200 and response.json()["permit"] is False
                assert "participants" not in response.json()  # no ids to a non-steward
            else:
                assert response.status_code == 403, f"{method} {path} as {role}: {response.text}"
                assert error_of(response)["exit_code"] == 4
            role_refusals[member] += 1
        for role in sorted(allowed, key=["analyst", "auditor", "steward"].index):
            with running.client(lab.tokens[role]) as http:
                response = http.request(method, path, **kw)
            assert response.is_success, f"{method} {path} as {role}: {response.text}"
            if path.startswith("/v1/exports/") and "export_id" in response.json():
                outbox = lab.vault / "outbox" / response.json()["export_id"]
                state["manifest"] = json.loads((outbox / "manifest.json").read_text())
    assert running.stop() == 0
    with Vault.open(lab.vault, TEST_PASSPHRASE) as v:
        log = v.audit_entries()
    text_of = [json.dumps(e, sort_keys=True) for e in log]
    for source, (path, kind) in refused_from.items():
        assert any(f'"{source}"' in t and '"refuse"' in t for t in text_of), \
            f"the {kind} token's refusal on {path} from {source} is not in the audit log"
    for token in lab.tokens.values():
        secret = token.rsplit("-", 1)[-1]
        assert not any(secret in t for t in text_of), "a token's secret reached the audit log"
    for member, count in role_refusals.items():
        refusals = [e for e in log if e.get("actor") == member and e.get("decision") == "refuse"]
        assert len(refusals) >= count, f"{member}: {count} refusals, {len(refusals)} audited"
    assert verify_audit(lab.vault).ok


def test_an_export_archive_is_only_for_the_member_who_made_it(lab, serve, tmp_path: Path) -> None:
    running = serve(lab.vault)
    with running.client(lab.tokens["analyst"]) as analyst:
        made = analyst.post("/v1/exports/matrix", json={
            "purpose": "recommender-training", "category": "ratings-explicit", "epsilon": 0.5,
            "items": [f"dish-{j:02d}" for j in range(4)]})
        assert made.status_code == 200, made.text
        archive = made.json()["archive"]
        assert archive == f"/v1/exports/{made.json()['export_id']}/archive"
    with running.client(lab.tokens["steward"]) as steward:  # even a steward is not its maker
        refused = steward.get(archive)
        assert refused.status_code == 404 and error_of(refused)["exit_code"] == 6
    with running.client(None, source="127.0.0.251") as anonymous:
        assert anonymous.get(archive).status_code == 401
    with running.client(lab.tokens["analyst"]) as analyst:
        assert analyst.get("/v1/exports/x-doesnotexist/archive").status_code == 404
        with analyst.stream("GET", archive) as got:
            assert got.status_code == 200, got.read()
            assert got.headers["content-type"] == "application/x-tar"
            data = b"".join(got.iter_bytes())
        # a tar stream (POSIX ustar magic at offset 257 of the first header: common practice)
        assert data[257:262] == b"ustar"
        # read by the standard library's tar reader (independent of our packer), then verified
        # with the vault's public key alone, as the remote client does before keeping it
        import io
        import tarfile

        received = tmp_path / "received"
        received.mkdir()
        with tarfile.open(fileobj=io.BytesIO(data), mode="r:") as tar:
            names = tar.getnames()
            assert "manifest.json" in names and not any(n.startswith(("/", "..")) for n in names)
            tar.extractall(received, filter="data")
        from vault import describe, verify_export

        key = bytes.fromhex(describe(lab.vault)["public_key"])
        assert verify_export(received, key)["ok"]
        again = analyst.get(archive)  # downloaded completely once: gone
        assert again.status_code == 404
    assert not (lab.vault / "outbox" / made.json()["export_id"]).exists()


def test_failed_authentications_are_throttled_per_client(lab, serve) -> None:
    """More than 10 failures from one address in a minute (the library's rule) answer 429 with
    Retry-After; another address with a good token is not held back."""
    running = serve(lab.vault)
    statuses = []
    with running.client("mwt1-" + "f" * 16 + "0" * 64, source="127.0.0.253") as http:
        for _ in range(13):
            statuses.append(http.get("/v1/info"))
    codes = [r.status_code for r in statuses]
    assert codes[:10] == [401] * 10 and codes[-1] == 429, codes
    throttled = statuses[-1]
    assert error_of(throttled)["exit_code"] == 10 and throttled.headers["retry-after"].isdigit()
    with running.client(lab.tokens["auditor"], source="127.0.0.254") as http:
        assert http.get("/v1/info").status_code == 200


def test_a_forwarded_for_header_neither_escapes_the_throttle_nor_names_the_client(lab, serve) -> None:
    """A caller on loopback sending a new X-Forwarded-For (or Forwarded) address with every
    guess: still throttled after 10 as one address, and the log names the real peer. (From
    127.0.0.1 itself: the address uvicorn would trust such headers from by default.)"""
    running = serve(lab.vault)  # a fresh process: no failures counted yet
    codes = []
    with running.client("mwt1-" + "e" * 16 + "0" * 64, source="127.0.0.1") as http:
        for i in range(12):
            spoof = f"203.0.113.{i + 1}"
            codes.append(http.get("/v1/info", headers={"X-Forwarded-For": spoof,
                                                        "Forwarded": f"for={spoof}",
                                                        "X-Real-IP": spoof}).status_code)
    assert codes[:10] == [401] * 10 and codes[10:] == [429, 429], codes
    running.stop()
    from tests.conftest import TEST_PASSPHRASE
    from vault import Vault

    with Vault.open(lab.vault, TEST_PASSPHRASE) as v:
        refused = [e for e in v.audit_entries() if e["action"] == "auth.token"
                   and e["decision"] == "refuse"]
    clients = {e["details"]["client"] for e in refused}
    assert "127.0.0.1" in clients and not any(c.startswith("203.0.113.") for c in clients)
