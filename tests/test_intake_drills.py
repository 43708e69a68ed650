"""Drills against a real `lytestream serve` over raw sockets: stalled and aborted uploads."""

from __future__ import annotations

import signal
import socket
import time
from pathlib import Path

import httpx
import orjson
import pytest

from tests.factories import HEADERS, bundle, dumps, observation
from tests.servers import clean_env, free_port, mint_token, start_server

pytestmark = pytest.mark.slow

MARKER = "ZZ-IDENT-4711"  # an invented identifier that must never reach the log


def request_head(port: int, token: str, length: int) -> bytes:
    return (f"POST /fhir HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\nAuthorization: Bearer {token}\r\n"
            f"Content-Type: application/fhir+json\r\nContent-Length: {length}\r\n\r\n").encode()


def read_response(sock: socket.socket) -> tuple[bytes, bool]:
    """Everything the server sends until it closes the connection (or 15 s pass); and whether it closed."""
    sock.settimeout(15)
    data = b""
    try:
        while chunk := sock.recv(65536):
            data += chunk
    except TimeoutError:
        return data, False
    return data, True


def test_a_stalled_upload_is_answered_408_with_an_outcome_and_the_connection_closed(tmp_path: Path) -> None:
    port = free_port()
    token = mint_token(tmp_path)
    proc = start_server(port, "--data-dir", str(tmp_path),
                        env=clean_env(LYTESTREAM_BODY_TIMEOUT_SECONDS="1"))
    try:
        body = dumps(bundle("transaction", observation(MARKER)))
        with socket.create_connection(("127.0.0.1", port)) as sock:
            sock.sendall(request_head(port, token, len(body)) + body[: len(body) // 2])
            answer, closed = read_response(sock)  # and never send the rest
        head, _, payload = answer.partition(b"\r\n\r\n")
        assert head.startswith(b"HTTP/1.1 408")
        outcome = orjson.loads(payload)
        assert outcome["resourceType"] == "OperationOutcome"
        assert outcome["issue"][0]["code"] == "timeout"
        assert closed
        auth = {"Authorization": f"Bearer {token}"}
        found = httpx.get(f"http://127.0.0.1:{port}/fhir/Observation", headers=auth, timeout=10).json()
        assert found["total"] == 0
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def test_an_upload_completed_within_the_timeout_is_stored(tmp_path: Path) -> None:
    port = free_port()
    token = mint_token(tmp_path)
    proc = start_server(port, "--data-dir", str(tmp_path),
                        env=clean_env(LYTESTREAM_BODY_TIMEOUT_SECONDS="5"))
    try:
        body = dumps(bundle("transaction", observation("R1")))
        with socket.create_connection(("127.0.0.1", port)) as sock:
            sock.sendall(request_head(port, token, len(body)) + body[:50])
            time.sleep(0.5)  # a slow sender, well within the timeout
            sock.sendall(body[50:])
            sock.settimeout(15)
            answer = sock.recv(65536)
        assert answer.startswith(b"HTTP/1.1 200")
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def test_an_aborted_upload_logs_one_line_without_traceback_or_content(tmp_path: Path) -> None:
    port = free_port()
    token = mint_token(tmp_path)
    log = tmp_path / "server.log"
    proc = start_server(port, "--data-dir", str(tmp_path), log=log)
    try:
        body = dumps(bundle("transaction", observation(MARKER)))
        with socket.create_connection(("127.0.0.1", port)) as sock:
            sock.sendall(request_head(port, token, len(body)) + body[: len(body) // 2])
            time.sleep(0.5)  # the server is reading the body when the client goes away
        time.sleep(1.0)
        # The server goes on serving.
        r = httpx.post(f"http://127.0.0.1:{port}/fhir", content=dumps(bundle("transaction", observation("R2"))),
                       headers={**HEADERS, "Authorization": f"Bearer {token}"}, timeout=10)
        assert r.status_code == 200
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=10)
    text = log.read_text()
    assert text.count("body aborted") == 1, text
    assert "Traceback" not in text
    assert MARKER not in text
