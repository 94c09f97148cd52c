"""Every HTTP error is JSON: {"error": {"code", "message", "field", ...}}.

Bad input from measurement (InputError and its subclasses) maps to its status here, in one
place; anything unexpected becomes a 500 "internal error" with no details in the response
and a log line with an incident id, the exception type and the code locations only (an
exception's message can quote survey cells, which must never reach the logs).
"""

from __future__ import annotations

import logging
import secrets
import traceback

from flask import Flask, Response, jsonify, request
from werkzeug.exceptions import HTTPException

from samesource.errors import DataError, DesignError, InputError, UnsupportedFormat

log = logging.getLogger("samesource.service")


class ApiError(Exception):
    """An error answer with its status, code, message and the request field it concerns."""

    def __init__(self, status: int, code: str, message: str, field: str | None = None,
                 extra: dict | None = None, *, headers: dict | None = None) -> None:
        super().__init__(message)
        self.status = status
        self.code = code
        self.message = message
        self.field = field
        self.extra = dict(extra or {})
        self.headers = dict(headers or {})  # e.g. Retry-After on 429 and 503

    def body(self) -> dict:
        err = {"code": self.code, "message": self.message, "field": self.field}
        err.update(self.extra)
        return {"error": err}


def echo(value: object, limit: int = 60) -> str:
    """What a client sent, quoted for a message and cut to ``limit`` characters: enough to
    recognise, never a 5000-character id sent back."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 4] + "...'"


def input_error_status(e: InputError) -> int:
    if e.code == "too_large":
        return 413
    if isinstance(e, UnsupportedFormat):
        return 415
    if isinstance(e, DataError):
        return 422
    return 400  # DesignError, bad options, other bad input


def input_error_body(e: InputError, *, field_prefix: str | None = None) -> dict:
    """The error object for an InputError: its message (with where), field, row and column."""
    err = e.to_dict()
    if isinstance(e, DesignError) and e.field is not None and field_prefix:
        err["field"] = f"{field_prefix}.{e.field}" if e.field != "(top)" else field_prefix
    if e.row is not None:
        err["row"] = e.row
    if e.column is not None:
        err["column"] = e.column
    return err


def from_input_error(e: InputError, *, field_prefix: str | None = None) -> ApiError:
    err = input_error_body(e, field_prefix=field_prefix)
    extra = {k: v for k, v in err.items() if k not in ("code", "message", "field")}
    return ApiError(input_error_status(e), err["code"], err["message"], err["field"], extra)


STORAGE_RETRY_AFTER = 5  # seconds a client should wait after a 503 for unreachable storage
OVERLOAD_RETRY_AFTER = 2  # ... and after a 503 for an overloaded server (a queue drains fast)


def storage_error(e: BaseException) -> ApiError | None:
    """The answer for a condition of the machine rather than of the request: 507 when the
    disk is full (deletes still work and free space), 503 when the database does not answer;
    None for anything else."""
    from .faults import is_disk_full, is_transient

    if is_disk_full(e):
        log.error("request refused: the disk is full (%s %s)", request.method, request.path)
        return ApiError(507, "insufficient_storage",
                        "the service's disk is full, so nothing new can be stored; delete "
                        "datasets that are no longer needed (DELETE /v1/datasets/ID still works) "
                        "or ask the operator to free space, then try again")
    if is_transient(e):
        log.error("request refused: storage unavailable: %s", safe_trace(e))
        return ApiError(503, "storage_unavailable",
                        "the service's database does not answer at the moment; try again in a "
                        "few seconds", headers={"Retry-After": str(STORAGE_RETRY_AFTER)})
    return None


def safe_trace(exc: BaseException) -> str:
    """The exception's type and where it was raised, without its message."""
    frames = traceback.extract_tb(exc.__traceback__)
    where = " <- ".join(f"{f.filename.rsplit('/', 2)[-1]}:{f.lineno}:{f.name}"
                        for f in reversed(frames[-8:]))
    return f"{type(exc).__module__}.{type(exc).__qualname__} at {where}"


# Werkzeug's HTTP errors in our words.
_HTTP_CODES = {
    400: ("bad_request", "the request could not be understood"),
    401: ("unauthorized", "an API token is needed: send 'Authorization: Bearer TOKEN'"),
    404: ("not_found", "there is nothing at this address; see GET /v1/openapi.json for the routes"),
    405: ("method_not_allowed", "this address does not accept that method"),
    411: ("length_required", "send a Content-Length header"),
    413: ("too_large", "the request body is over the upload limit"),
    415: ("unsupported_media_type", "the request body has a content type this route does not take"),
}


def json_error(status: int, code: str, message: str, field: str | None = None,
               extra: dict | None = None) -> Response:
    resp = jsonify(ApiError(status, code, message, field, extra).body())
    resp.status_code = status
    if status == 401:
        resp.headers["WWW-Authenticate"] = 'Bearer realm="samesource"'
    return resp


def register(app: Flask) -> None:
    limit_mb = app.config.get("SAMESOURCE_MAX_UPLOAD_MB")

    @app.errorhandler(ApiError)
    def _api_error(e: ApiError) -> Response:
        resp = json_error(e.status, e.code, e.message, e.field, e.extra)
        resp.headers.update(e.headers)
        return resp

    @app.errorhandler(InputError)
    def _input_error(e: InputError) -> Response:
        api = from_input_error(e)
        return json_error(api.status, api.code, api.message, api.field, api.extra)

    @app.errorhandler(HTTPException)
    def _http_error(e: HTTPException) -> Response:
        status = e.code or 500
        code, message = _HTTP_CODES.get(status, (f"http_{status}", e.description or e.name))
        if status == 413 and limit_mb:
            message = f"the request body is over the upload limit of {limit_mb:g} MB"
        resp = json_error(status, code, message)
        if status == 405 and hasattr(e, "valid_methods") and e.valid_methods:
            resp.headers["Allow"] = ", ".join(sorted(e.valid_methods))
        return resp

    @app.errorhandler(Exception)
    def _unexpected(e: Exception) -> Response:
        storage = storage_error(e)
        if storage is not None:
            return _api_error(storage)
        incident = secrets.token_hex(6)
        log.error("internal error %s on %s %s: %s", incident, request.method,
                  request.url_rule.rule if request.url_rule else "?", safe_trace(e))
        return json_error(500, "internal_error",
                          f"internal error (incident {incident}); the request was not completed")
