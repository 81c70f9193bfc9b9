"""Streamed recording uploads: the stored recording is the one a local ingest of the same file
stores (the same blob: ingesting it again is `already_stored`), and an upload cut short stores
nothing."""

from __future__ import annotations

from tests.server.conftest import edf_file, error_of


def test_an_uploaded_recording_is_what_a_local_ingest_stores(lab, serve) -> None:
    running = serve(lab.vault)
    data = edf_file().read_bytes()
    with running.client(lab.tokens["steward"]) as http:
        # pids[0] had this file ingested locally when the lab was built
        again = http.post(f"/v1/ingest/eeg/{lab.pids[0]}", content=data)
        assert again.status_code == 200, again.text
        assert again.json()["already_stored"] is True
        fresh = http.post(f"/v1/ingest/eeg/{lab.pids[7]}", content=data,
                          params={"keep_sex": "true", "age_band": "5"})
        assert fresh.status_code == 200, fresh.text
        assert fresh.json()["already_stored"] is False
        assert fresh.json()["recording"]["format"].startswith("EDF")


def _send_raw(url: str, head: bytes, body: bytes) -> bytes:
    """An HTTP/1.1 request written by hand (a client that breaks off: httpx will not send one),
    then the write side closed; what the service answered, if anything."""
    import socket
    from urllib.parse import urlsplit

    where = urlsplit(url)
    with socket.create_connection((where.hostname, where.port)) as sock:
        sock.sendall(head + body)
        sock.shutdown(socket.SHUT_WR)
        answer = b""
        while chunk := sock.recv(65536):
            answer += chunk
    return answer


def test_an_upload_cut_short_stores_nothing(lab, serve) -> None:
    running = serve(lab.vault)
    data = edf_file().read_bytes()
    with running.client(lab.tokens["steward"]) as http:
        before = http.get("/v1/info").json()["blobs"]
    head = (f"POST /v1/ingest/eeg/{lab.pids[8]} HTTP/1.1\r\nHost: 127.0.0.1\r\n"
            f"Authorization: Bearer {lab.tokens['steward']}\r\n"
            f"Content-Length: {len(data)}\r\nContent-Type: application/octet-stream\r\n\r\n").encode()
    answer = _send_raw(running.url, head, data[: len(data) // 2])
    assert b"Traceback" not in answer
    with running.client(lab.tokens["steward"]) as http:
        assert http.get("/v1/info").json()["blobs"] == before
        # and the service goes on taking uploads
        assert http.post(f"/v1/ingest/eeg/{lab.pids[8]}", content=data).status_code == 200
    assert not any(b"Traceback" in line for line in running.stderr)


def test_a_malformed_recording_is_refused_as_the_library_refuses_it(lab, serve) -> None:
    running = serve(lab.vault)
    with running.client(lab.tokens["steward"]) as http:
        response = http.post(f"/v1/ingest/eeg/{lab.pids[9]}", content=b"not an EDF file" * 100)
        assert response.status_code == 422 and error_of(response)["exit_code"] == 8
