"""/healthz's answer: storage reachable, the job runner's threads alive, the oldest queued
analysis's age and free disk space; not ok (503) when work cannot run."""

from __future__ import annotations

import logging
import shutil

from samesource import __version__

from . import uploads
from .context import Services
from .errors import safe_trace
from .store import utcnow

log = logging.getLogger("samesource.service")


def health(svc: Services) -> tuple[dict, bool]:
    """The health body and whether the service can do its work."""
    body: dict = {"status": "ok", "database": svc.store.db.dialect, "version": __version__,
                  "executor": svc.config.executor}
    ok = True
    try:
        svc.store.db.ping()
        oldest = svc.store.oldest_queued_at()
        body["storage"] = "ok"
        body["oldest_queued_seconds"] = (None if oldest is None
                                         else round((utcnow() - oldest).total_seconds(), 1))
    except Exception as e:
        log.error("health check: database unavailable: %s", safe_trace(e))
        body["storage"] = "unavailable"
        ok = False
    try:
        free = shutil.disk_usage(svc.config.data_dir).free
        body["disk_free_bytes"] = free
        if free < svc.config.min_free_bytes:
            body["disk"] = "full"
            ok = False
        else:
            body["disk"] = "ok"
            uploads.ensure_reserve(svc.config.data_dir)  # given up on a full disk: back now
    except OSError:
        body["disk"] = "unavailable"
        ok = False
    if svc.runner is not None:
        runner = svc.runner.state()
        body["runner"] = runner
        if runner["state"] != "running" or runner["workers_alive"] == 0:
            ok = False
    if not ok:
        body["status"] = "unavailable"
    return body, ok
