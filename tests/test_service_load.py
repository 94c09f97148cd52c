"""The HTTP server under load answers promptly (service/server.py, docs/reliability.md "Load").

The cause of the 50-client timeouts (docs/reliability.md): clients keep idle connections open
between requests; at waitress's connection limit it stops accepting, and new clients waited in
the listen backlog until an idle connection timed out (120 s by default). These run the real
server in this process, on loopback, with a tiny WSGI app, in a few seconds.
"""

from __future__ import annotations

import socket
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager

import requests
from waitress import wasyncore

from samesource.service import server as srv
from samesource.service.config import ServiceConfig
from samesource.service.context import QUEUED_SECONDS


def _app(pause: float = 0.0) -> Callable:
    def app(environ, start_response):
        time.sleep(pause)
        body = f"{environ.get(QUEUED_SECONDS, -1):.3f}".encode()
        start_response("200 OK", [("Content-Type", "text/plain"),
                                  ("Content-Length", str(len(body)))])
        return [body]
    return app


@contextmanager
def running(app: Callable, config: ServiceConfig, threads: int = 2) -> Iterator[str]:
    server = srv.make_server(app, config, host="127.0.0.1", port=0, threads=threads)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.effective_port}"
    finally:
        server.task_dispatcher.shutdown(timeout=5)
        wasyncore.close_all(server._map)
        thread.join(5)


def _keep_alive(port: int) -> socket.socket:
    """A client connection that made one request and stays open, idle (as pooled clients do)."""
    s = socket.create_connection(("127.0.0.1", port), timeout=5)
    s.sendall(b"GET / HTTP/1.1\r\nHost: x\r\n\r\n")
    got = b""
    while b"\r\n\r\n" not in got:
        got += s.recv(4096)
    head, body = got.split(b"\r\n\r\n", 1)
    length = int(next(line.split(b":")[1] for line in head.split(b"\r\n")
                      if line.lower().startswith(b"content-length")))
    while len(body) < length:
        body += s.recv(4096)
    assert head.startswith(b"HTTP/1.1 200")
    return s


def test_idle_connections_at_the_limit_do_not_keep_new_clients_waiting():
    # limit 10 (the smallest allowed); 2 map entries are the listener and waitress's trigger
    cfg = ServiceConfig(connection_limit=10, idle_seconds=120)
    with running(_app(), cfg) as base:
        port = int(base.rsplit(":", 1)[1])
        idle = [_keep_alive(port) for _ in range(12)]  # more than the limit holds
        try:
            t0 = time.monotonic()
            for _ in range(5):  # without reclaiming, each waited for the 120 s idle timeout
                assert requests.get(base, timeout=5).status_code == 200
            assert time.monotonic() - t0 < 5
        finally:
            for s in idle:
                s.close()


def test_a_request_that_waited_for_a_thread_carries_its_wait():
    with running(_app(pause=1.0), ServiceConfig(), threads=1) as base:
        out: list[float] = []
        ts = [threading.Thread(target=lambda: out.append(float(requests.get(base, timeout=10).text)))
              for _ in range(2)]
        for t in ts:
            t.start()
            time.sleep(0.1)
        for t in ts:
            t.join()
    first, second = sorted(out)
    assert 0 <= first < 0.5 and 0.7 < second < 3.0, out  # the second waited for the first


def test_a_request_past_the_queue_limit_gets_503_with_retry_after(tmp_path):
    from samesource.service.app import create_app

    app = create_app({"data_dir": tmp_path / "data", "run_jobs": False,
                      "max_queue_seconds": 2.0})
    client = app.test_client()
    late = client.get("/v1/datasets", environ_overrides={QUEUED_SECONDS: 2.5})
    assert late.status_code == 503 and late.headers["Retry-After"]
    assert late.get_json()["error"]["code"] == "overloaded"
    assert "SAMESOURCE_MAX_QUEUE_SECONDS" in late.get_json()["error"]["message"]
    # in time: served as usual (401: no token); /healthz is never shed
    assert client.get("/v1/datasets", environ_overrides={QUEUED_SECONDS: 1.0}).status_code == 401
    assert client.get("/healthz", environ_overrides={QUEUED_SECONDS: 60.0}).status_code in (200, 503)
    assert client.get("/healthz", environ_overrides={QUEUED_SECONDS: 60.0}).get_json()["status"]
