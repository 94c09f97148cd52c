"""/v1/datasets: upload a survey file, list, read and delete uploads."""

from __future__ import annotations

import logging
import os
import re

from flask import Blueprint, Response, jsonify, request

from measurement.design import draft_design
from measurement.drafting import Draft, draft_from_table
from measurement.errors import InputError
from measurement.loading import LoadedTable, load_table, text_answers
from measurement.prepare import numeric_columns

from .. import upload_stream, uploads
from ..context import services
from ..errors import ApiError, echo, from_input_error
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


def text_warnings(table: LoadedTable, mapped: set[str]) -> list[dict]:
    """A ``text_answers`` warning per item-like column holding answer texts; ``mapped``
    columns (the draft's answer_labels cover them) say so."""
    out = []
    for col, info in text_answers(table).items():
        shown = ", ".join(repr(t) for t in info["texts"][:6]) + (", ..." if len(info["texts"]) > 6 else "")
        if col in mapped:
            advice = "the draft design maps them with answer_labels: check the numbers"
        else:
            advice = ("map them to numbers with answer_labels in the design before starting an "
                      "analysis of this item")
        out.append({"code": "text_answers", "column": col, "row": info["row"], "text": info["text"],
                    "texts": info["texts"], "rows": info["rows"], "message": (
                        f"column '{col}' holds answer texts ({shown}; first in {table.row_label} "
                        f"{info['row']}), not numbers; {advice}")})
    return out


def _draft(table: LoadedTable, columns: list[str], numeric: list[str]) -> Draft:
    """The draft from the answers; from the names alone should reading the answers fail
    on something unforeseen (an upload is never refused for its draft)."""
    try:
        return draft_from_table(table)
    except Exception as e:  # noqa: BLE001 - the draft is a convenience, the upload is what counts
        log.warning("draft from the answers failed (%s); drafted from the names", e.__class__.__name__)
        left: list[dict] = []
        return Draft(design=draft_design(columns, numeric=numeric, left_out=left), left_out=left)


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
    existing = svc.store.find_dataset_by_sha256(tenant_id(), spooled.sha256)
    if existing is not None:  # the same bytes again: answer the dataset already stored
        spooled.discard()
        log.info("upload of %d bytes is dataset %s again; not stored twice", spooled.size, existing["id"])
        return _reused(existing)
    try:
        try:
            table = load_table(spooled.path, name=name, max_bytes=cfg.max_upload_bytes)
            columns = [str(c) for c in table.frame.columns]
            numeric = numeric_columns(table)
            draft = _draft(table, columns, numeric)
        except InputError as e:
            err = from_input_error(e)
            if err.field is None:
                err.field = "file"
            log.info("upload refused: %s (%d bytes)", err.code, spooled.size)
            raise err from None
        dataset_id = new_id("ds")
        rel = uploads.stored_relpath(tenant_id(), dataset_id)
        uploads.keep(spooled, cfg.data_dir, rel)
    except BaseException:
        spooled.discard()
        raise
    mapped = {i for c in draft.design["constructs"].values() for i in c["items"]} \
        if draft.design.get("answer_labels") else set()
    sheets = [dict(d, chosen=d["name"] == table.sheet) for d in table.sheets]
    details = {"sheet": table.sheet, "sheets": sheets, "draft_left_out": draft.left_out,
               "draft_notes": draft.notes, "sheet_columns": table.sheet_columns}
    try:
        ds = svc.store.add_dataset(
            tenant_id(), dataset_id, name=name, format=table.format, sha256=spooled.sha256,
            size_bytes=spooled.size, rows=int(len(table.frame)), columns=columns,
            numeric_columns=numeric, draft_design=draft.design,
            warnings=list(table.warnings) + text_warnings(table, mapped), details=details,
            stored_path=rel)
    except BaseException:
        uploads.remove(cfg.data_dir, rel)
        raise
    log.info("dataset %s stored: %d bytes, %d rows, %d columns, %s", dataset_id, spooled.size,
             ds["rows"], len(columns), table.format)
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
