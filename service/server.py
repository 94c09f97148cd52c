"""`samesource serve`: the app under waitress, stopped cleanly by SIGTERM or Ctrl-C.

waitress refuses a body over its size cap as soon as it has read the headers, before the
body arrives; we set that cap to the upload limit (plus multipart framing) and make its own
error answers JSON in our error shape, so even those keep the contract.

Under load the server answers promptly or not at all (docs/reliability.md, "Load"):

* At its connection limit waitress stops accepting, and new clients wait in the listen
  backlog until a connection closes; idle keep-alive connections (clients keep them open
  between requests) would otherwise hold every slot for the whole idle timeout. So at the
  limit the idle ones are closed, the longest idle first (:class:`ReclaimingServer`).
* A request that waited for a request thread longer than ``max_queue_seconds`` is answered
  503 `overloaded` with Retry-After by the app (:data:`QUEUED_SECONDS` in its environ)
  instead of being served late, so a deep queue drains in moments.
"""

from __future__ import annotations

import json
import logging
import signal
import socket
import sys
import time
from typing import Any

from waitress.adjustments import Adjustments
from waitress.channel import HTTPChannel
from waitress.parser import HTTPRequestParser
from waitress.server import MultiSocketServer, TcpWSGIServer
from waitress.task import ErrorTask, ThreadedTaskDispatcher, WSGITask

from .app import create_app
from .config import MULTIPART_SLACK, ServiceConfig
from .context import EXTENSION, QUEUED_SECONDS

log = logging.getLogger("samesource.service")

_CODES = {400: "bad_request", 413: "too_large", 431: "headers_too_large", 501: "not_implemented"}


class JsonErrorTask(ErrorTask):
    """waitress's own error answers (malformed HTTP, body over the cap) as our JSON."""

    def execute(self) -> None:
        e = self.request.error
        code = _CODES.get(e.code, "bad_request")
        message = {413: "the request body is over the upload limit"}.get(
            e.code, f"the HTTP request could not be read ({e.reason.lower()})")
        body = json.dumps({"error": {"code": code, "message": message, "field": None}}).encode()
        self.status = f"{e.code} {e.reason}"
        self.response_headers.append(("Content-Type", "application/json"))
        self.set_close_on_finish()
        self.content_length = len(body)
        self.write(body)


class StampedParser(HTTPRequestParser):
    """A request that remembers when it was fully received (waitress reads the whole body
    before it queues the request for a thread)."""

    completed_at: float | None = None

    def received(self, data: bytes) -> int:
        n = super().received(data)
        if self.completed and self.completed_at is None:
            self.completed_at = time.monotonic()
        return n


class QueueTimedTask(WSGITask):
    """Puts the request's wait for a thread into its environ (QUEUED_SECONDS)."""

    def get_environment(self) -> dict:
        environ = super().get_environment()
        done = getattr(self.request, "completed_at", None)
        if done is not None and QUEUED_SECONDS not in environ:
            environ[QUEUED_SECONDS] = time.monotonic() - done
        return environ


class JsonErrorChannel(HTTPChannel):
    error_task_class = JsonErrorTask
    task_class = QueueTimedTask
    parser_class = StampedParser


def idle(channel: HTTPChannel) -> bool:
    """A kept-alive connection between requests: nothing being read, served or sent, and no
    bytes of a next request waiting in the socket (closing it then would lose the request)."""
    if (channel.request is not None or channel.requests or channel.total_outbufs_len
            or channel.will_close or channel.close_when_flushed):
        return False
    try:
        return channel.socket.recv(1, socket.MSG_PEEK | socket.MSG_DONTWAIT) == b""  # peer gone
    except BlockingIOError:
        return True  # nothing sent: idle
    except OSError:
        return True  # a broken connection is as good as idle


class ReclaimingServer(TcpWSGIServer):
    """waitress's TCP server that, at its connection limit, closes idle kept-alive
    connections (the longest idle first) down to nine tenths of the limit, so that new
    clients are accepted instead of waiting in the backlog for the idle timeout."""

    channel_class = JsonErrorChannel

    def readable(self) -> bool:
        if self.accepting and len(self._map) >= self.adj.connection_limit:
            self.reclaim_idle()
        return super().readable()

    def reclaim_idle(self) -> int:
        excess = len(self._map) - self.adj.connection_limit * 9 // 10
        spare = sorted((c for c in self.active_channels.values() if idle(c)),
                       key=lambda c: c.last_activity)[:max(excess, 0)]
        for channel in spare:
            channel.will_close = True  # closed by the loop's next pass, as waitress's timeout does
        if spare:
            log.info("at the connection limit (%d): closing %d idle connection(s)",
                     self.adj.connection_limit, len(spare))
        return len(spare)


def make_server(app: Any, config: ServiceConfig, *, host: str, port: int,
                threads: int) -> TcpWSGIServer | MultiSocketServer:
    """waitress's ``create_server`` for TCP with :class:`ReclaimingServer` and our limits."""
    adj = Adjustments(host=host, port=port, threads=threads,
                      max_request_body_size=config.max_upload_bytes + MULTIPART_SLACK + 1,
                      ident="samesource", clear_untrusted_proxy_headers=True,
                      connection_limit=config.connection_limit,
                      channel_timeout=config.idle_seconds,
                      cleanup_interval=max(1, min(30, config.idle_seconds // 2)))
    dispatcher = ThreadedTaskDispatcher()
    dispatcher.set_thread_count(adj.threads)
    socket_map: dict = {}
    servers = [ReclaimingServer(app, socket_map, dispatcher=dispatcher, adj=adj, sockinfo=info)
               for info in adj.listen]
    if len(servers) == 1:
        return servers[0]
    return MultiSocketServer(socket_map, adj, [(s.effective_host, s.effective_port)
                                               for s in servers], dispatcher, servers[0].log_info)


def serve(config: ServiceConfig, *, host: str, port: int, threads: int = 8,
          announce: Any = None) -> int:
    app = create_app(config)
    svc = app.extensions[EXTENSION]
    server = make_server(app, config, host=host, port=port, threads=threads)
    bound_host, bound_port = (server.effective_listen[0] if isinstance(server, MultiSocketServer)
                              else (server.effective_host, server.effective_port))
    print(f"samesource: serving on http://{bound_host}:{bound_port} "
          f"(data: {config.data_dir}, database: {svc.store.db.dialect}, executor: {config.executor})",
          file=announce or sys.stdout, flush=True)

    def _stop(signum, _frame) -> None:
        raise SystemExit(0)

    signal.signal(signal.SIGTERM, _stop)
    try:
        server.run()
    except (KeyboardInterrupt, SystemExit):
        pass
    finally:
        log.info("stopping")
        server.close()
        svc.close()
    return 0
