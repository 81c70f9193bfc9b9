"""Property-based fuzzing of the whole API from the OpenAPI document the live service serves
(schemathesis generates each operation's requests, valid and invalid, from that document), sent by
a steward, an analyst, an auditor, a caller with no token and one with a bad token (expired,
revoked or forged):

- no answer is a 5xx, and every answer fits the document (status, content type, headers, body
  schema: schemathesis's own response checks);
- after every refused request (any 4xx or 503) the vault's files and every row of its database are
  what they were before: the audit log alone may grow, by appending;
- at the end the service's own `audit verify` is clean, and so are the library's full `verify` and
  the offline log check once the service has stopped.

Bounded for CI by a number of examples per operation and mode, never by time. The cases run are
counted and printed (docs/service.md records a run's figure). MINDWARD_FUZZ_SEED replays a run;
MINDWARD_FUZZ_EXAMPLES changes the bound."""

from __future__ import annotations

import itertools
import os
import random
from typing import Any

import httpx
import pytest

from tests.conftest import TEST_PASSPHRASE
from tests.server.conftest import Lab, build_lab, start
from tests.server.vault_state import read_state

EXAMPLES = int(os.environ.get("MINDWARD_FUZZ_EXAMPLES", "24"))
CALLERS = ("steward", "analyst", "auditor", "none", "bad")
BAD = ("expired", "revoked", "forged")
FORGED = "mwt1-" + "0123456789abcdef" + "5a" * 32


def _checks() -> list[Any]:
    from schemathesis.checks import not_a_server_error
    from schemathesis.specs.openapi.checks import (
        content_type_conformance,
        negative_data_rejection,
        response_headers_conformance,
        response_schema_conformance,
        status_code_conformance,
    )

    return [not_a_server_error, status_code_conformance, content_type_conformance,
            response_headers_conformance, response_schema_conformance, negative_data_rejection]


class Callers:
    """An httpx client per caller; callers without a good token each send from a fresh loopback
    address (failed authentications are throttled per address: tests/server/conftest.py)."""

    def __init__(self, origin: str, tokens: dict[str, str]) -> None:
        self.origin = origin
        self.tokens = tokens
        self.fixed = {role: self._client(f"127.0.0.{2 + i}")
                      for i, role in enumerate(("steward", "analyst", "auditor"))}
        self._addresses = (f"127.{a}.{b}.{c}" for a, b, c in itertools.product(
            range(1, 250), range(256), range(1, 255)))

    def _client(self, source: str) -> httpx.Client:
        return httpx.Client(base_url=self.origin, timeout=600,
                            transport=httpx.HTTPTransport(local_address=source))

    def send(self, caller: str, bad: str, kw: dict[str, Any]) -> httpx.Response:
        headers = {k: v for k, v in kw.get("headers", {}).items()
                   if k.lower() not in ("authorization", "x-schemathesis-testcaseid")}
        if caller in self.fixed:
            headers["Authorization"] = f"Bearer {self.tokens[caller]}"
        elif caller == "bad":
            headers["Authorization"] = f"Bearer {FORGED if bad == 'forged' else self.tokens[bad]}"
        body: dict[str, Any] = {}
        if "json" in kw:
            body["json"] = kw["json"]
        elif kw.get("data") is not None:
            data = kw["data"]
            body["content"] = data.encode() if isinstance(data, str) else data
        request = dict(method=kw["method"], url=kw["url"], params=kw.get("params"),
                       headers=headers, **body)
        if caller in self.fixed:
            return self.fixed[caller].request(**request)
        with self._client(next(self._addresses)) as client:
            return client.request(**request)

    def close(self) -> None:
        for client in self.fixed.values():
            client.close()


@pytest.fixture(scope="module")
def fuzz_lab(tmp_path_factory: pytest.TempPathFactory) -> Lab:
    return build_lab(tmp_path_factory.mktemp("fuzzed"))


@pytest.mark.slow
def test_the_whole_api_fuzzed_from_its_own_openapi_document(fuzz_lab: Lab) -> None:
    import schemathesis
    from hypothesis import HealthCheck, given, seed, settings
    from hypothesis import strategies as st
    from hypothesis.errors import Unsatisfiable
    from schemathesis import GenerationMode

    from vault import Vault, verify_audit

    run_seed = int(os.environ.get("MINDWARD_FUZZ_SEED") or random.SystemRandom().randrange(2**32))
    print(f"fuzz seed {run_seed} (MINDWARD_FUZZ_SEED={run_seed} replays it)")
    running = start(fuzz_lab.vault)
    callers = Callers(running.origin, fuzz_lab.tokens)
    counts = {"cases": 0, "refused": 0, "succeeded": 0, "without invalid requests": 0}
    try:
        document = httpx.get(running.origin + "/v1/openapi.json").json()
        schemathesis.serializer.alias("application/toml", "text/plain")  # consent forms are text
        schema = schemathesis.openapi.from_dict(_without_security(document))
        checks = _checks()
        operations = [result.ok() for result in schema.get_all_operations()]
        assert len(operations) == sum(len(ops) for ops in document["paths"].values())

        for operation, mode in itertools.product(
                operations, (GenerationMode.POSITIVE, GenerationMode.NEGATIVE)):
            @seed(run_seed)
            @settings(max_examples=EXAMPLES, deadline=None, database=None, derandomize=False,
                      suppress_health_check=list(HealthCheck), print_blob=True)
            @given(case=operation.as_strategy(generation_mode=mode),
                   caller=st.sampled_from(CALLERS), bad=st.sampled_from(BAD))
            def one_case(case: Any, caller: str, bad: str) -> None:
                before = read_state(fuzz_lab.vault)
                kw = case.as_transport_kwargs(base_url=running.origin)
                response = callers.send(caller, bad, kw)
                counts["cases"] += 1
                case.validate_response(response, checks=checks)
                if response.status_code >= 400:
                    counts["refused"] += 1
                    changed = before.changes_besides_log(read_state(fuzz_lab.vault))
                    assert not changed, (f"{kw['method']} {kw['url']} as {caller} was refused "
                                         f"({response.status_code}) yet changed {changed}")
                else:
                    counts["succeeded"] += 1

            try:
                one_case()
            except Unsatisfiable:  # nothing in this operation's requests can be made invalid
                assert mode is GenerationMode.NEGATIVE, operation.label
                counts["without invalid requests"] += 1

        report = callers.fixed["auditor"].get("/v1/audit/verify", headers={
            "Authorization": f"Bearer {fuzz_lab.tokens['auditor']}"})
        assert report.status_code == 200 and report.json()["ok"], report.text
    finally:
        callers.close()
        stopped = running.stop()
        for pipe in (running.proc.stdout, running.proc.stderr):
            pipe.close()
    print(f"fuzzed {counts['cases']} cases over {len(operations)} operations "
          f"({counts['refused']} refused, {counts['succeeded']} succeeded; "
          f"{counts['without invalid requests']} operations have no invalid request to make)")
    assert stopped == 0
    assert counts["cases"] >= len(operations) * 2, counts
    assert counts["refused"] and counts["succeeded"], counts
    assert verify_audit(fuzz_lab.vault).ok
    with Vault.open(fuzz_lab.vault, TEST_PASSPHRASE) as v:
        assert v.verify()["ok"]


def _without_security(document: dict[str, Any]) -> dict[str, Any]:
    """The document without its bearer scheme: this test sets the Authorization header itself
    (per caller), so schemathesis must not generate or mutate one."""
    paths = {path: {method: {k: v for k, v in op.items() if k != "security"}
                    for method, op in ops.items()} for path, ops in document["paths"].items()}
    components = {k: v for k, v in document["components"].items() if k != "securitySchemes"}
    return {**document, "paths": paths, "components": components}


