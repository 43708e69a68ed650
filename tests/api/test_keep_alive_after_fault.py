"""A server fault answers 500 and leaves the kept-alive connection usable (a real uvicorn on loopback).

Starlette's catch-all answers and raises on to the server, and uvicorn then closes the connection: the
next request on it failed with a reset. The last resort (service/api/last_resort.py) answers and does not
raise, so the connection carries the next request.
"""

from __future__ import annotations

import http.client
import threading
import time
from typing import Any

import pytest
import uvicorn

from service.api.context import AppContext
from service.auth.tokens import mint
from service.main import create_app


@pytest.mark.timeout(30)
def test_the_connection_carries_the_next_request_after_a_500(context: AppContext,
                                                             monkeypatch: pytest.MonkeyPatch) -> None:
    def broken(*_: Any, **__: Any) -> Any:
        raise RuntimeError("a server fault")

    monkeypatch.setattr(context.ingestor, "batch", broken)
    with context.db.session(write=True) as session:
        token = mint(session, client="t", scope="system/*.cruds", now=context.clock.now())
    server = uvicorn.Server(uvicorn.Config(create_app(context=context), host="127.0.0.1", port=0,
                                           log_level="critical", lifespan="off"))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    try:
        deadline = time.monotonic() + 10
        while not server.started and time.monotonic() < deadline:
            time.sleep(0.02)
        port = server.servers[0].sockets[0].getsockname()[1]
        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=5)
        headers = {"Authorization": f"Bearer {token}", "Content-Type": "application/fhir+json"}
        conn.request("POST", "/fhir", body=b'{"resourceType":"Bundle","type":"batch","entry":[]}', headers=headers)
        first = conn.getresponse()
        assert first.status == 500
        assert b'"OperationOutcome"' in first.read()
        conn.request("GET", "/fhir/metadata", headers=headers)  # the same connection
        assert conn.getresponse().status == 200
        conn.close()
    finally:
        server.should_exit = True
        thread.join(10)
