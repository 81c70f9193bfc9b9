"""The OpenAPI 3.1 document: docs/openapi.json is what a live service serves (regenerate it with
`python -m vault.server.openapi > docs/openapi.json`), and it describes every route."""

from __future__ import annotations

import json

from tests.conftest import ROOT

DOC = ROOT / "docs" / "openapi.json"


def test_the_kept_document_equals_what_the_live_service_serves(lab, serve) -> None:
    running = serve(lab.vault)
    with running.client() as http:  # no token needed for the document
        served = http.get("/v1/openapi.json")
    assert served.status_code == 200
    live = json.dumps(served.json(), indent=2, sort_keys=True) + "\n"
    assert DOC.read_text() == live, "regenerate: python -m vault.server.openapi > docs/openapi.json"


def test_the_document_is_openapi_3_1_and_lists_the_contract_routes() -> None:
    doc = json.loads(DOC.read_text())
    assert doc["openapi"].startswith("3.1.")
    routes = {(m.upper(), p) for p, ops in doc["paths"].items() for m in ops}
    for route in [("GET", "/v1/health"), ("GET", "/v1/info"), ("POST", "/v1/access/check"),
                  ("POST", "/v1/ingest/eeg/{pid}"), ("GET", "/v1/exports/{export_id}/archive"),
                  ("POST", "/v1/audit/consistency"), ("DELETE", "/v1/members/{name}"),
                  ("POST", "/v1/withdrawals/{target}/process"), ("POST", "/v1/sweep")]:
        assert route in routes
    # every route but the two open ones declares the bearer token
    for path, ops in doc["paths"].items():
        for op in ops.values():
            if path in ("/v1/health", "/v1/openapi.json"):
                assert not op.get("security")
            else:
                assert op.get("security") == [{"HTTPBearer": []}], path
