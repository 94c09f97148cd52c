"""/v1/datasets: upload a survey file, list, read and delete uploads."""

from __future__ import annotations

import logging
import os
import re

from flask import Blueprint, Response, jsonify, request

from .. import upload_gate, upload_stream, uploads
from ..config import setting_name
from ..context import Services, services
from ..errors import OVERLOAD_RETRY_AFTER, ApiError, echo
from ..faults import is_disk_full
from ..store import new_id
from .auth import tenant_id
from .paging import page_args

log = logging.getLogger("samesource.service")

_UNSAFE = re.compile(r"[\x00-\x1f\x7f/\\]")


def public(ds: dict) -> dict:
    return {k: v for k, v in ds.items() if k not in ("stored_path", "tenant_id", "sheet_columns")}


def _file_name(raw: str | None) -> str:
    """The upload's own name without any folder part, for messages and format detection."""
    name = os.path.basename((raw or "").replace("\\", "/")).strip()
    name = _UNSAFE.sub("_", name)[:200]
    return name or "upload"


def _reused(existing: dict) -> tuple[Response, int]:
    out = public(existing)
    out["reused"] = True
    resp = jsonify(out)
    resp.headers["Location"] = f"/v1/datasets/{existing['id']}"
    return resp, 200


def upload() -> tuple[Response, int]:
    svc = services()
    cfg = svc.config
    if request.mimetype != "multipart/form-data":
        raise ApiError(415, "unsupported_media_type",
                       "send the survey file as multipart/form-data in the field 'file' "
                       f"(got Content-Type {request.mimetype or 'none'!r})", "file")
    spooled, name = _spool_file_field(cfg)
    # The same bytes sent again at the same moment wait here for the first, then get its
    # dataset as a later duplicate does: the check and the storing are one step.
    try:
        with svc.same_bytes.holding(tenant_id(), spooled.sha256):
            return _parse_and_store(svc, spooled, name)
    finally:
        spooled.discard()  # gone already when stored


def _parse_and_store(svc: Services, spooled: uploads.Spooled, name: str) -> tuple[Response, int]:
    cfg = svc.config
    existing = svc.store.find_dataset_by_sha256(tenant_id(), spooled.sha256)
    if existing is not None:  # the same bytes again: answer the dataset already stored
        log.info("upload of %d bytes is dataset %s again; not stored twice", spooled.size, existing["id"])
        return _reused(existing)
    try:
        with svc.parse_slots.taken():
            parsed = uploads.parse_bounded(spooled.path, name, uploads.ParseLimits.from_config(cfg))
    except upload_gate.Busy as e:
        slots = svc.parse_slots
        log.warning("overloaded: an upload waited %.1f s for a parsing slot (all %d busy); "
                    "answered 503", e.waited, slots.size)
        raise ApiError(503, "overloaded", (
            f"the service is overloaded: this upload waited {e.waited:.1f} s for one of its "
            f"{slots.size} parsing slots (SAMESOURCE_MAX_PARSERS), over "
            f"SAMESOURCE_MAX_QUEUE_SECONDS ({slots.wait_seconds:g} s); try again in "
            f"{OVERLOAD_RETRY_AFTER} s"),
            headers={"Retry-After": str(OVERLOAD_RETRY_AFTER)}) from None
    except uploads.OverLimit as e:
        setting = setting_name(e.field)
        log.info("upload refused: over %s (%d bytes)", setting, spooled.size)
        raise ApiError(e.status, "over_limit", f"{e.message} ({setting}); remove what the "
                       "analysis does not use, or split the file", "file",
                       {"limit": setting, "limit_value": e.value}) from None
    except ApiError as err:
        if err.field is None:
            err.field = "file"
        log.info("upload refused: %s (%d bytes)", err.code, spooled.size)
        raise
    columns = parsed.columns
    dataset_id = new_id("ds")
    rel = uploads.stored_relpath(tenant_id(), dataset_id)
    uploads.keep(spooled, cfg.data_dir, rel)
    try:
        ds, stored = svc.store.add_dataset_once(
            tenant_id(), dataset_id, name=name, format=parsed.format, sha256=spooled.sha256,
            size_bytes=spooled.size, rows=parsed.rows, columns=columns,
            numeric_columns=parsed.numeric_columns, draft_design=parsed.draft_design,
            warnings=list(parsed.warnings), details=parsed.details, stored_path=rel)
    except BaseException:
        uploads.remove(cfg.data_dir, rel)
        raise
    if not stored:  # another service process stored the same bytes meanwhile
        uploads.remove(cfg.data_dir, rel)
        log.info("upload of %d bytes is dataset %s again; not stored twice", spooled.size, ds["id"])
        return _reused(ds)
    log.info("dataset %s stored: %d bytes, %d rows, %d columns, %s", dataset_id, spooled.size,
             ds["rows"], len(columns), parsed.format)
    resp = jsonify(public(ds))
    resp.headers["Location"] = f"/v1/datasets/{dataset_id}"
    return resp, 201


def _spool_file_field(cfg) -> tuple[uploads.Spooled, str]:
    """The multipart field 'file' streamed to a spool file as the body is read (never the
    whole body in memory), and the file's name."""
    boundary = request.mimetype_params.get("boundary")
    if not boundary:
        raise ApiError(400, "bad_request", "the multipart/form-data Content-Type has no boundary; "
                       "let the HTTP client build the form", "file")
    body = upload_stream.MultipartFileStream(request.stream, boundary)
    try:
        spooled = uploads.spool(body, cfg.uploads_dir, max_bytes=cfg.max_upload_bytes)
    except uploads.TooLarge:
        raise ApiError(413, "too_large", f"the file is over the upload limit of "
                       f"{cfg.max_upload_mb:g} MB; remove columns the analysis does not use, "
                       "compress it (.csv.gz or .parquet), or split the file", "file") from None
    except upload_stream.MultipartError as e:
        raise ApiError(400, "bad_request", f"{e}; send the survey file as multipart/form-data in "
                       "the field 'file'", "file") from None
    if not body.found:
        spooled.discard()
        raise ApiError(400, "missing_file", "the multipart body has no field 'file' holding the "
                       "survey file", "file")
    return spooled, _file_name(body.filename)


def list_datasets() -> Response:
    limit, offset = page_args()
    rows, total = services().store.list_datasets(tenant_id(), limit=limit, offset=offset)
    return jsonify({"datasets": [public(d) for d in rows], "total": total, "limit": limit,
                    "offset": offset})


def _found(dataset_id: str) -> dict:
    ds = services().store.get_dataset(tenant_id(), dataset_id)
    if ds is None:
        raise ApiError(404, "not_found", f"no dataset {echo(dataset_id)}", "id")
    return ds


def get_dataset(dataset_id: str) -> Response:
    return jsonify(public(_found(dataset_id)))


def delete_dataset(dataset_id: str) -> tuple[str, int]:
    svc = services()
    try:
        gone = svc.store.delete_dataset(tenant_id(), dataset_id)
    except Exception as e:
        if not is_disk_full(e):
            raise
        # The disk is full and the database cannot write: free the dataset's own file and
        # the space reserve, then delete again (deleting is how space is freed).
        ds = svc.store.get_dataset(tenant_id(), dataset_id)
        if ds is not None:
            uploads.remove(svc.config.data_dir, ds["stored_path"])
        uploads.release_reserve(svc.config.data_dir)
        log.warning("disk full: dataset %s deleted with the space reserve given up", dataset_id)
        gone = svc.store.delete_dataset(tenant_id(), dataset_id)
    if gone is None:
        raise ApiError(404, "not_found", f"no dataset {echo(dataset_id)}", "id")
    try:
        uploads.remove(svc.config.data_dir, gone["stored_path"])
    except OSError as e:  # the row is gone; a leftover file is only disk space
        log.warning("dataset %s: stored file not removed (%s)", dataset_id, e.__class__.__name__)
    log.info("dataset %s deleted with %d analyses", dataset_id, len(gone["analysis_ids"]))
    return "", 204


def add_routes(bp: Blueprint) -> None:
    bp.add_url_rule("/datasets", "upload_dataset", upload, methods=["POST"])
    bp.add_url_rule("/datasets", "list_datasets", list_datasets, methods=["GET"])
    bp.add_url_rule("/datasets/<dataset_id>", "get_dataset", get_dataset, methods=["GET"])
    bp.add_url_rule("/datasets/<dataset_id>", "delete_dataset", delete_dataset, methods=["DELETE"])
