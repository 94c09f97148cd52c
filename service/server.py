"""`samesource serve`: the app under waitress, stopped cleanly by SIGTERM or Ctrl-C.

waitress refuses a body over its size cap as soon as it has read the headers, before the
body arrives; we set that cap to the upload limit (plus multipart framing) and make its own
error answers JSON in our error shape, so even those keep the contract.
"""

from __future__ import annotations

import json
import logging
import signal
import sys
from typing import Any

from waitress.channel import HTTPChannel
from waitress.server import create_server
from waitress.task import ErrorTask

from .app import create_app
from .config import MULTIPART_SLACK, ServiceConfig
from .context import EXTENSION

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


class JsonErrorChannel(HTTPChannel):
    error_task_class = JsonErrorTask


def serve(config: ServiceConfig, *, host: str, port: int, threads: int = 8,
          announce: Any = None) -> int:
    app = create_app(config)
    svc = app.extensions[EXTENSION]
    server = create_server(app, host=host, port=port, threads=threads,
                           max_request_body_size=config.max_upload_bytes + MULTIPART_SLACK + 1,
                           ident="samesource", clear_untrusted_proxy_headers=True)
    server.channel_class = JsonErrorChannel
    bound_host, bound_port = server.effective_host, server.effective_port
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
