"""/v1/analyses: start an analysis of a dataset, follow it, read its report.

POST validates everything it can before answering 202: the JSON body, the design (parsed,
and checked against the columns of the sheet to be read), the options, and the answer texts
the upload found in the design's items (422 when answer_labels do not map one). Problems
only the run reveals (an answer outside the response scale) become the analysis's error,
naming row and column.
"""

from __future__ import annotations

import importlib
import importlib.util
import json
import logging
import re
from datetime import datetime

from flask import Blueprint, Response, jsonify, request

from samesource.errors import DataError, InputError
from samesource.input.design import Design, answer_key, check_columns, did_you_mean, parse_design
from samesource.input.loading import MISSING_WORDS
from samesource.options import AnalysisOptions

from .. import quotas
from ..context import services
from ..errors import ApiError, echo, from_input_error
from .auth import tenant_id
from .openapi import XLSX  # the format registry's media type, as the API documents it
from .paging import page_args

log = logging.getLogger("samesource.service")

HTML_MODULE = "samesource.output.report_html"
_BODY_FIELDS = ("dataset_id", "design", "options", "sources")


def public(a: dict, *, report: dict | None = None, include_report: bool = True) -> dict:
    out = {k: v for k, v in a.items() if k not in ("tenant_id", "report_text")}
    if include_report:
        out["report"] = report
    return out


def _reject_constant(name: str) -> float:
    raise ValueError(f"{name} is not a JSON number")


_SURROGATE_ESCAPE = re.compile(r"\\u[dD][89a-fA-F][0-9a-fA-F]{2}")


def _lone_surrogate(body: object) -> str | None:
    """Where the parsed body holds a string (or key) with half of a UTF-16 surrogate pair, a
    \\uD800-\\uDFFF escape that is no character: it could be neither stored nor reported.
    Iterative, as the body may nest as deeply as the JSON parser allows."""
    stack: list[tuple[str, object]] = [("", body)]
    while stack:
        where, value = stack.pop()
        if isinstance(value, str):
            try:
                value.encode("utf-8")
            except UnicodeEncodeError:
                return where.encode("utf-8", "backslashreplace").decode("utf-8")
        elif isinstance(value, dict):
            for k, v in value.items():
                path = f"{where}.{k}" if where else k
                stack += [(path, k), (path, v)]
        elif isinstance(value, list):
            stack += [(f"{where}[{i}]", v) for i, v in enumerate(value)]
    return None


def json_body() -> dict:
    """The request's JSON object, or a 415/400 saying what is wrong with it."""
    if request.mimetype != "application/json":
        raise ApiError(415, "unsupported_media_type",
                       f"send a JSON body with Content-Type: application/json (got "
                       f"{request.mimetype or 'none'!r})", None)
    raw = request.get_data(cache=True)
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        raise ApiError(400, "bad_json", f"the body is not UTF-8 text (byte {e.start})") from None
    try:
        body = json.loads(text, parse_constant=_reject_constant)
    except json.JSONDecodeError as e:
        raise ApiError(400, "bad_json", f"the body is not valid JSON: {e.msg} at line {e.lineno}, "
                       f"column {e.colno}") from None
    except RecursionError:
        raise ApiError(400, "bad_json", "the body's lists or objects are nested too deeply to "
                       "read; a request needs only a few levels") from None
    except ValueError as e:
        if "digits" in str(e):  # Python's limit on the digits of an integer
            raise ApiError(400, "bad_json", "the body holds a number with too many digits to "
                           "read (over 4300); send numbers with a few digits") from None
        raise ApiError(400, "bad_json", f"the body is not valid JSON: {e}") from None
    if not isinstance(body, dict):
        raise ApiError(400, "bad_request", "the body must be a JSON object {\"dataset_id\", "
                       "\"design\", \"options\"}")
    if _SURROGATE_ESCAPE.search(text):
        where = _lone_surrogate(body)
        if where is not None:
            raise ApiError(400, "bad_json", f"the body's text at '{where}' holds a \\u escape "
                           "for half of a UTF-16 surrogate pair (\\ud800 to \\udfff) without "
                           "its other half, which is no character; send the text as UTF-8", where)
    return body


def create() -> tuple[Response, int]:
    svc = services()
    body = json_body()
    unknown = sorted(set(body) - set(_BODY_FIELDS))
    if unknown:
        raise ApiError(400, "bad_request", f"unknown field '{unknown[0]}'; allowed: "
                       f"{', '.join(_BODY_FIELDS)}", unknown[0])
    dataset_id = body.get("dataset_id")
    if not isinstance(dataset_id, str) or not dataset_id:
        raise ApiError(400, "bad_request", "give the id of an uploaded dataset (a string, from "
                       "POST /v1/datasets)", "dataset_id")
    if "design" not in body:
        raise ApiError(400, "bad_design", "the study design is missing (see docs/design-file.md, "
                       "or start from the dataset's draft_design)", "design")
    ds = svc.store.get_dataset(tenant_id(), dataset_id)
    if ds is None:
        raise ApiError(404, "not_found", f"no dataset {echo(dataset_id)}", "dataset_id")
    try:
        options = AnalysisOptions.from_dict(body.get("options"))
    except InputError as e:
        raise from_input_error(e) from None
    try:
        design = parse_design(body["design"])
        columns = _sheet_columns(ds, options.sheet)
        if columns is not None:
            read = ds.get("sheet") if options.sheet is None else options.sheet
            others = {k: v for k, v in (ds.get("sheet_columns") or {}).items() if k != read}
            check_columns(design, columns, file=f"{ds['name']} (sheet '{read}')" if read else ds["name"],
                          other_sheets=others)
    except InputError as e:
        raise from_input_error(e, field_prefix="design") from None
    sources = _sources(svc, design, body.get("sources"))
    quotas.check_new_analysis(svc.config, svc.store, tenant_id(), int(options.bootstrap or 0))
    if options.sheet is None or options.sheet == ds.get("sheet"):
        try:
            _check_texts(design, ds)
        except InputError as e:
            raise from_input_error(e) from None
    a = svc.store.add_analysis(tenant_id(), dataset_id, body["design"], options.to_dict(), sources=sources)
    if svc.runner is not None:
        svc.runner.notify()
    log.info("analysis %s queued for dataset %s", a["id"], dataset_id)
    resp = jsonify({"id": a["id"], "status": a["status"], "dataset_id": dataset_id,
                    "created_at": a["created_at"]})
    resp.headers["Location"] = f"/v1/analyses/{a['id']}"
    return resp, 202


def _sources(svc, design: Design, given: object) -> dict[str, str]:
    """``sources`` {NAME: dataset_id}: each a dataset of this tenant (404 otherwise), one per
    source the design names (400 otherwise), holding that source's columns (400)."""
    from samesource.input.sources import check_source_columns

    if given is None:
        given = {}
    if not isinstance(given, dict) or not all(isinstance(v, str) and v for v in given.values()):
        raise ApiError(400, "bad_request", "must be an object {NAME: dataset_id} naming the dataset of each "
                       "source in the design's 'sources'", "sources")
    for name in design.sources:
        if name not in given:
            raise ApiError(400, "bad_request", f"the design's source '{name}' has no dataset: add "
                           f"\"{name}\": DATASET_ID (upload its file with POST /v1/datasets)", f"sources.{name}")
    for name, ds_id in given.items():
        if name not in design.sources:
            known = ", ".join(design.sources) or "none"
            raise ApiError(400, "bad_request", f"the design names no source {echo(name)}"
                           f"{did_you_mean(name, design.sources)} (its sources: {known})", f"sources.{name}")
        ds = svc.store.get_dataset(tenant_id(), ds_id)
        if ds is None:
            raise ApiError(404, "not_found", f"no dataset {echo(ds_id)}", f"sources.{name}")
        try:
            check_source_columns(design, name, ds["columns"], file=ds["name"])
        except InputError as e:
            raise from_input_error(e, field_prefix="design") from None
    return dict(given)


def _sheet_columns(ds: dict, sheet: str | None) -> list[str] | None:
    """The columns of the sheet an analysis will read (None: not known from the upload)."""
    if sheet is None or sheet == ds.get("sheet"):
        return ds["columns"]
    by_sheet = ds.get("sheet_columns") or {}
    if sheet in by_sheet:
        return by_sheet[sheet]
    if by_sheet:
        raise ApiError(400, "bad_options", f"sheet {echo(sheet)} not found{did_you_mean(sheet, by_sheet)}; "
                       f"the workbook has sheets {', '.join(repr(k) for k in by_sheet)}", "options.sheet")
    return None


def _check_texts(design: Design, ds: dict) -> None:
    """422 at once when an item holds answer texts the design's answer_labels do not map."""
    found = {w["column"]: w for w in ds.get("warnings") or [] if w.get("code") == "text_answers"
             and isinstance(w.get("column"), str)}
    for item in design.items:
        w = found.get(item)
        if w is None:
            continue
        labels = design.labels_for(item)
        rows = w.get("rows") or [w.get("row")] * len(w.get("texts") or [])
        for text, row in zip(w.get("texts") or [], rows, strict=False):
            if answer_key(text) in labels or text.strip().lower() in MISSING_WORDS:
                continue
            hint = did_you_mean(answer_key(text), list(labels)) if labels else ""
            advice = (f"answer_labels has no entry for it{hint}; add it (a text meaning no answer may map to null)"
                      if labels else "map the answer texts to numbers with answer_labels in the design, "
                      "for example {\"Strongly disagree\": 1, ..., \"Strongly agree\": 5} (the dataset's "
                      "draft_design proposes it for scales it recognises)")
            raise DataError(f"item '{item}' holds the answer text {text!r}, not a number: {advice}",
                            file=ds["name"], row=row, column=item, code="text_answers")


def _found(analysis_id: str, *, with_report: bool = False) -> dict:
    a = services().store.get_analysis(tenant_id(), analysis_id, with_report=with_report)
    if a is None:
        raise ApiError(404, "not_found", f"no analysis {echo(analysis_id)}", "id")
    return a


def get_one(analysis_id: str) -> Response:
    a = _found(analysis_id, with_report=True)
    report = json.loads(a["report_text"]) if a["report_text"] else None
    return jsonify(public(a, report=report))


def list_all() -> Response:
    limit, offset = page_args()
    dataset_id = request.args.get("dataset_id")
    rows, total = services().store.list_analyses(tenant_id(), dataset_id=dataset_id, limit=limit,
                                                 offset=offset)
    return jsonify({"analyses": [public(a, include_report=False) for a in rows], "total": total,
                    "limit": limit, "offset": offset})


def _finished(a: dict) -> str:
    """The report text, or 409 while the analysis has none."""
    if a["status"] == "succeeded" and a["report_text"]:
        return a["report_text"]
    if a["status"] == "failed":
        raise ApiError(409, "analysis_failed", "the analysis failed, so it has no report: "
                       + (a["error"] or {}).get("message", "no reason recorded"), None,
                       {"status": a["status"]})
    p = a["progress"]
    raise ApiError(409, "not_finished", f"the analysis is {a['status']} (stage {p['stage'] or '-'}"
                   f", {p['done']} of {p['total']}); ask again when its status is succeeded",
                   None, {"status": a["status"]})


def report_json(analysis_id: str) -> Response:
    text = _finished(_found(analysis_id, with_report=True))
    return Response(text, status=200, mimetype="application/json")


def html_renderer(name: str = "render_html"):
    """A renderer of samesource.output.report_html (render_html) or samesource.output.brief (render_brief)
    when that module exists in this version, else None."""
    module = HTML_MODULE if name == "render_html" else "samesource.output.brief"
    try:
        if importlib.util.find_spec(module) is None:
            return None
    except ModuleNotFoundError:
        return None
    return getattr(importlib.import_module(module), name)


def _made_when(a: dict) -> str | None:
    """The time the analysis finished, as the report and the brief print it."""
    t = a.get("finished_at")
    if isinstance(t, datetime):
        return t.strftime("%Y-%m-%d %H:%M UTC")
    return str(t)[:16].replace("T", " ") + " UTC" if t else None


def _page(analysis_id: str, name: str, what: str) -> Response:
    a = _found(analysis_id, with_report=True)
    render = html_renderer(name)
    if render is None:
        raise ApiError(404, "not_available", f"the {what} is not available in this version "
                       "of samesource; read report.json", None)
    text = _finished(a)
    return Response(render(json.loads(text), when=_made_when(a)), status=200, mimetype="text/html")


def report_html(analysis_id: str) -> Response:
    return _page(analysis_id, "render_html", "HTML report")


def brief_html(analysis_id: str) -> Response:
    return _page(analysis_id, "render_brief", "one-page brief")




def _tables(analysis_id: str) -> dict:
    from samesource.output.tables import report_tables

    return report_tables(json.loads(_finished(_found(analysis_id, with_report=True))))


def tables_xlsx(analysis_id: str) -> Response:
    """The report's tables as one workbook, the command line's tables.xlsx."""
    from samesource.output.tables import tables_xlsx as workbook

    resp = Response(workbook(_tables(analysis_id)), status=200, mimetype=XLSX)
    resp.headers["Content-Disposition"] = f'attachment; filename="{analysis_id}-tables.xlsx"'
    return resp


def table_csv(analysis_id: str, name: str) -> Response:
    """One table as CSV, as the command line writes it into tables/."""
    from samesource.output.tables import tables_csv

    files = tables_csv(_tables(analysis_id))
    want = f"{name}.csv"
    if want not in files:
        names = [f[:-4] for f in files]
        raise ApiError(404, "not_found", f"no table {echo(name)}{did_you_mean(name, names)}; the "
                       f"tables are {', '.join(names)}", "name")
    resp = Response(files[want], status=200, mimetype="text/csv")
    resp.headers["Content-Disposition"] = f'attachment; filename="{want}"'
    return resp


def add_routes(bp: Blueprint) -> None:
    bp.add_url_rule("/analyses/<analysis_id>/tables.xlsx", "tables_xlsx", tables_xlsx, methods=["GET"])
    bp.add_url_rule("/analyses/<analysis_id>/tables/<name>.csv", "table_csv", table_csv, methods=["GET"])
    bp.add_url_rule("/analyses", "create_analysis", create, methods=["POST"])
    bp.add_url_rule("/analyses", "list_analyses", list_all, methods=["GET"])
    bp.add_url_rule("/analyses/<analysis_id>", "get_analysis", get_one, methods=["GET"])
    bp.add_url_rule("/analyses/<analysis_id>/report.json", "report_json", report_json,
                    methods=["GET"])
    bp.add_url_rule("/analyses/<analysis_id>/report.html", "report_html", report_html,
                    methods=["GET"])
    bp.add_url_rule("/analyses/<analysis_id>/brief.html", "brief_html", brief_html,
                    methods=["GET"])
