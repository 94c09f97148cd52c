"""The Flask app factory: configuration, storage, job runner, blueprints, JSON errors."""

from __future__ import annotations

import logging
import shutil
from collections.abc import Mapping
from typing import Any

from flask import Flask, request

from . import api, errors, pages, uploads
from .config import MULTIPART_SLACK, ConfigError, ServiceConfig, load_config
from .context import EXTENSION, QUEUED_SECONDS, Services
from .db import Database
from .runner import JobRunner, make_backend
from .security import security_headers
from .store import Store

log = logging.getLogger("samesource.service")


def create_app(config: ServiceConfig | Mapping[str, Any] | None = None) -> Flask:
    """The service as a WSGI app. ``config``: a ServiceConfig, or settings over the
    environment (as the flags of ``samesource serve`` are). With ``run_jobs`` (the default)
    the job runner starts here; ``app.extensions["samesource"].close()`` stops it."""
    cfg = config if isinstance(config, ServiceConfig) else load_config(config)
    cfg.data_dir.mkdir(parents=True, exist_ok=True)
    cfg.uploads_dir.mkdir(parents=True, exist_ok=True)
    uploads.ensure_reserve(cfg.data_dir)
    db = Database(cfg.sqlalchemy_url)
    db.create_schema()
    store = Store(db)

    app = Flask("samesource.service", static_folder=None)
    app.config["MAX_CONTENT_LENGTH"] = cfg.max_upload_bytes + MULTIPART_SLACK
    app.config["SAMESOURCE_MAX_UPLOAD_MB"] = cfg.max_upload_mb
    app.json.sort_keys = False  # fields in the documented order
    svc = Services(config=cfg, store=store)
    app.extensions[EXTENSION] = svc

    @app.before_request
    def _shed_requests_that_waited_too_long() -> None:
        # First of all: a request that waited past the setting for a request thread (the
        # server puts the wait in the environ) is answered at once rather than served late,
        # so a deep queue drains in moments and clients get an answer, not a timeout.
        waited = request.environ.get(QUEUED_SECONDS)
        if waited is not None and waited > cfg.max_queue_seconds and request.path != "/healthz":
            log.warning("overloaded: %s %s waited %.1f s for a request thread; answered 503",
                        request.method, request.path, waited)
            raise errors.ApiError(503, "overloaded", (
                f"the service is overloaded: this request waited {waited:.1f} s for a request "
                f"thread, over SAMESOURCE_MAX_QUEUE_SECONDS ({cfg.max_queue_seconds:g} s); "
                f"try again in {errors.OVERLOAD_RETRY_AFTER} s"),
                headers={"Retry-After": str(errors.OVERLOAD_RETRY_AFTER)})

    @app.before_request
    def _refuse_large_bodies_early() -> None:
        # Before anything reads the body: the declared length alone is enough to say no.
        limit = app.config["MAX_CONTENT_LENGTH"]
        if request.content_length is not None and request.content_length > limit:
            raise errors.ApiError(413, "too_large", f"the request body ({request.content_length} "
                                  f"bytes) is over the upload limit of {cfg.max_upload_mb:g} MB",
                                  "file" if request.path == "/v1/datasets" else None)

    @app.before_request
    def _refuse_uploads_on_a_full_disk() -> None:
        # 507 before the body is read when the upload could not be stored anyway.
        if request.method == "POST" and request.path == "/v1/datasets":
            try:
                free = shutil.disk_usage(cfg.data_dir).free
            except OSError:
                return
            if free - (request.content_length or 0) < cfg.min_free_bytes:
                raise errors.ApiError(507, "insufficient_storage", (
                    f"the service's disk has {free / 1e6:.1f} MB free, too little to store this "
                    f"upload and keep {cfg.min_free_mb:g} MB (SAMESOURCE_MIN_FREE_MB) in reserve; "
                    "delete datasets that are no longer needed, or ask the operator to free "
                    "space"), "file")

    app.after_request(security_headers)
    errors.register(app)
    pages.register(app)
    api.register(app)

    if cfg.run_jobs:  # the serving process, not a one-off command such as `token create`
        try:
            svc.lock_fd = uploads.lock_data_dir(cfg.data_dir)
        except uploads.DataDirLocked as e:
            db.dispose()
            raise ConfigError(str(e)) from None
        _sweep_uploads(cfg, store)
        uploads.start_parsing_server()  # in the background: the first upload need not wait
        svc.runner = JobRunner(store, cfg, make_backend(cfg, store))
        svc.runner.start()
    return app


def _sweep_uploads(cfg: ServiceConfig, store: Store) -> None:
    try:
        gone = uploads.sweep(cfg.data_dir, store.stored_paths())
    except OSError as e:
        log.warning("sweeping orphaned upload files failed: %s", e.__class__.__name__)
        return
    if gone:
        log.warning("removed %d upload file(s) no dataset owns (left by an interrupted upload "
                    "or delete)", len(gone))
