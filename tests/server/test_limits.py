"""Bounded requests: JSON and form bodies over 1 MiB, scores over 64 MiB and uploads over
--max-upload-mb are answered 413 while they arrive (announced or not), and nothing is stored;
exports beyond --max-exports are told to come back (503, Retry-After, exit 10)."""

from __future__ import annotations

import itertools
import queue
import threading
from collections.abc import Iterator

import pytest

from tests.server.conftest import edf_file, error_of, form

MIB = 1024 * 1024
CODES = itertools.count()


def _chunks(total: int, piece: int = 64 * 1024) -> Iterator[bytes]:
    """A body sent without Content-Length (chunked), so only counting can stop it."""
    sent = 0
    while sent < total:
        n = min(piece, total - sent)
        sent += n
        yield b" " * n


def _facts(http) -> tuple[int, int]:
    info = http.get("/v1/info").json()
    return info["participants"], info["blobs"]


@pytest.mark.parametrize(("path", "headers", "limit"), [
    ("/v1/access/check", {"Content-Type": "application/json"}, MIB),
    ("/v1/enrol", {"Content-Type": "application/toml"}, MIB),
    ("/v1/ingest/scores?kind=explicit", {"Content-Type": "text/csv"}, 64 * MIB),
])
@pytest.mark.parametrize("announced", [True, False], ids=["content-length", "chunked"])
def test_bodies_over_their_limit_are_refused_with_413(lab, serve, path, headers, limit,
                                                      announced) -> None:
    running = serve(lab.vault)
    with running.client(lab.tokens["steward"]) as http:
        before = _facts(http)
        body = b" " * (limit + 1) if announced else _chunks(limit + 1)
        response = http.post(path, content=body, headers=headers)
        assert response.status_code == 413, response.text
        assert error_of(response)["exit_code"] == 8
    with running.client(lab.tokens["steward"]) as http:
        assert _facts(http) == before  # nothing was stored
        # the service goes on: a form of ordinary size is taken
        fresh = http.post("/v1/enrol", content=form(f"edge{next(CODES)}").encode(),
                          headers={"Content-Type": "application/toml"})
        assert fresh.status_code == 200, fresh.text


def test_an_upload_over_max_upload_mb_is_refused_and_nothing_is_stored(lab, serve) -> None:
    running = serve(lab.vault, "--max-upload-mb", "1")
    data = edf_file().read_bytes()
    assert len(data) > MIB
    with running.client(lab.tokens["steward"]) as http:
        before = _facts(http)
        announced = http.post(f"/v1/ingest/eeg/{lab.pids[5]}", content=data)
        assert announced.status_code == 413 and error_of(announced)["exit_code"] == 8
    with running.client(lab.tokens["steward"]) as http:
        assert _facts(http) == before


def test_an_upload_without_content_length_is_refused(lab, serve) -> None:
    running = serve(lab.vault)
    with running.client(lab.tokens["steward"]) as http:
        response = http.post(f"/v1/ingest/eeg/{lab.pids[5]}", content=_chunks(1000))
        assert response.status_code == 400 and error_of(response)["exit_code"] == 2


def test_exports_beyond_max_exports_are_told_to_retry(lab, serve) -> None:
    """Deterministic, no timing: an upload holds the vault's thread (its body is not all sent), two
    exports arrive with one slot: one is refused at once (503), the other waits and then succeeds.
    (A waiting loop, bounded by the upload being alive, not a speed check.)"""
    running = serve(lab.vault, "--max-exports", "1")
    data = edf_file().read_bytes()
    release = threading.Event()

    def held_body() -> Iterator[bytes]:
        yield data[:4096]
        release.wait()
        yield data[4096:]

    upload_done: queue.Queue[int] = queue.Queue()

    def upload() -> None:
        with running.client(lab.tokens["steward"]) as http:
            upload_done.put(http.post(f"/v1/ingest/eeg/{lab.pids[6]}", content=held_body(),
                                      headers={"Content-Length": str(len(data))}).status_code)

    finished: queue.Queue[tuple[int, dict, dict]] = queue.Queue()

    def export() -> None:
        with running.client(lab.tokens["analyst"]) as http:
            r = http.post("/v1/exports/eeg", json={"purpose": "method-development"})
            finished.put((r.status_code, dict(r.headers), r.json()))

    from vault import describe

    before = describe(lab.vault)["audit_entries"]
    uploader = threading.Thread(target=upload)
    uploader.start()
    # the upload holds the vault's thread once its token's use is audited (on that thread, in the
    # same job as the ingest, which then waits for the rest of the body)
    while describe(lab.vault)["audit_entries"] == before:
        assert uploader.is_alive(), f"the upload ended first: {upload_done.get()}"
        threading.Event().wait(0.01)
    exporters = [threading.Thread(target=export) for _ in range(2)]
    for t in exporters:
        t.start()
    first = finished.get(timeout=600)  # the refused one cannot wait for the vault
    release.set()
    second = finished.get(timeout=600)
    for t in [uploader, *exporters]:
        t.join()
    assert first[0] == 503, first
    assert first[1]["retry-after"].isdigit()
    assert first[2]["exit_code"] == 10
    assert second[0] == 200, second
    assert upload_done.get() == 200
