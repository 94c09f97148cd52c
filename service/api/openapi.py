"""GET /v1/openapi.json: the OpenAPI 3.1 description of every route.

Kept by hand beside the routes; tests/test_service_openapi.py checks that every Flask route
is described and that real responses validate against these schemas.
"""

from __future__ import annotations

from typing import Any

from flask import Blueprint, Response, jsonify

from samesource import __version__
from samesource.input.loading import FORMATS, READABLE, READER, READERS

REF = "#/components/schemas/"


def _ref(name: str) -> dict:
    return {"$ref": REF + name}


def _nullable(schema: dict) -> dict:
    return {"anyOf": [schema, {"type": "null"}]}


def _json(schema: dict, description: str) -> dict:
    return {"description": description, "content": {"application/json": {"schema": schema}}}


def _error(description: str) -> dict:
    return _json(_ref("Error"), description)


_ID = {"name": "id", "in": "path", "required": True, "schema": {"type": "string"}}
_PAGE = [
    {"name": "limit", "in": "query", "required": False,
     "schema": {"type": "integer", "minimum": 1, "maximum": 1000, "default": 100}},
    {"name": "offset", "in": "query", "required": False,
     "schema": {"type": "integer", "minimum": 0, "default": 0}},
]
_AUTH_ERRORS = {"401": _error("No API token, or not a valid one")}

XLSX = READER["xlsx"].media_types[0]
_LABELS = {"type": "object", "additionalProperties": {"type": ["number", "null"]}, "description": "answer texts to numbers (null: no answer), matched without regard to case and spaces"}

SCHEMAS: dict[str, Any] = {
    "ErrorObject": {
        "type": "object",
        "required": ["code", "message", "field"],
        "properties": {
            "code": {"type": "string", "description": "machine-readable reason, e.g. bad_design"},
            "message": {"type": "string", "description": "what is wrong and where, for a person"},
            "field": {"type": ["string", "null"],
                      "description": "the request field, design field or data column concerned"},
            "row": {"type": "integer", "description": "data row (the header is row 1), when known"},
            "column": {"type": "string", "description": "data column, when known"},
            "status": {"type": "string", "description": "the analysis's status (409 answers)"},
            "limit": {"type": "string", "description": "the setting whose limit was passed "
                      "(over_limit, 429 answers)"},
            "limit_value": {"type": "number", "description": "that setting's value"},
        },
    },
    "Error": {
        "type": "object",
        "required": ["error"],
        "properties": {"error": _ref("ErrorObject")},
    },
    "Warning": {
        "type": "object",
        "required": ["code", "message"],
        "properties": {"code": {"type": "string"}, "message": {"type": "string"}},
    },
    "Design": {
        "type": "object",
        "description": "The study design (docs/design-file.md).",
        "required": ["constructs"],
        "properties": {
            "constructs": {"type": "object", "additionalProperties": {
                "type": "object", "required": ["items"],
                "properties": {
                    "items": {"type": "array", "items": {"type": "string"}},
                    "reverse": {"type": "array", "items": {"type": "string"}},
                    "role": {"enum": ["substantive", "marker", "method"]},
                    "answer_labels": _LABELS,
                    "source": {"type": "string", "description": "a name in sources: the items come from "
                                                                 "that source's file"},
                    "same_as": {"type": "string", "description": "the construct of another source that "
                                                                  "this one measures again"},
                }}},
            "paths": {"type": "array", "items": {
                "type": "object", "required": ["outcome", "predictors"],
                "properties": {"outcome": {"type": "string"},
                               "predictors": {"type": "array", "items": {"type": "string"}}}}},
            "response_scale": {"type": "object", "required": ["min", "max"],
                               "properties": {"min": {"type": "number"}, "max": {"type": "number"}}},
            "missing_codes": {"type": "array", "items": {"type": "number"}},
            "id_column": {"type": "string"},
            "group_column": {"type": "string"},
            "answer_labels": _LABELS,
            "sources": {"type": "object", "description": "second sources joined on ids (docs/design-file.md)",
                        "additionalProperties": {
                            "type": "object", "required": ["id_column"],
                            "properties": {
                                "id_column": {"type": "string"},
                                "kind": {"enum": ["other_rater", "later_wave", "records"]},
                                "response_scale": {"type": "object", "required": ["min", "max"],
                                                   "properties": {"min": {"type": "number"},
                                                                  "max": {"type": "number"}}},
                                "missing_codes": {"type": "array", "items": {"type": "number"}},
                                "answer_labels": _LABELS}}},
        },
    },
    "Options": {
        "type": "object",
        "additionalProperties": False,
        "description": "Analysis options; every one is optional.",
        "properties": {
            "missing": {"type": "string", "default": "listwise",
                        "description": "listwise or fiml (matched without regard to case)"},
            "drop_flagged": {"type": "boolean", "default": False},
            "fit_time_limit": {"type": "number", "minimum": 0.1, "maximum": 3600, "default": 60},
            "n_starts": {"type": "integer", "minimum": 1, "maximum": 50, "default": 4},
            "confidence": {"type": "number", "minimum": 0.5, "maximum": 0.999, "default": 0.95},
            "bootstrap": {"type": "integer", "minimum": 0, "maximum": 100000, "default": 0},
            "seed": {"type": "integer", "minimum": 0, "maximum": 4294967295, "default": 0},
            "min_group_size": {"type": "integer", "minimum": 2, "maximum": 1000, "default": 5},
            "sheet": {"type": ["string", "null"], "default": None},
            "check_corrections": {"type": "integer", "minimum": 0, "maximum": 1000, "default": 0,
                                  "description": "simulated surveys per scenario of the correction check "
                                                 "(report.correction_check and report.next_time); 0: none"},
        },
    },
    "Dataset": {
        "type": "object",
        "required": ["id", "name", "rows", "columns", "format", "sha256", "created_at",
                     "draft_design"],
        "properties": {
            "id": {"type": "string"},
            "name": {"type": "string", "description": "the uploaded file's name"},
            "rows": {"type": "integer", "description": "respondent rows read"},
            "columns": {"type": "array", "items": {"type": "string"}},
            "numeric_columns": {"type": "array", "items": {"type": "string"},
                                "description": "columns whose cells all read as numbers"},
            "format": {"enum": list(FORMATS)},  # the reader registry (samesource.input.loading.READERS)
            "sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$",
                       "description": "SHA-256 of the file as uploaded (kept byte for byte)"},
            "size_bytes": {"type": "integer"},
            "created_at": {"type": "string", "format": "date-time"},
            "draft_design": {"type": "object",
                             "description": ("a design inferred from the column names, the answers "
                                             "and SPSS labels, to edit (docs/design-file.md, Drafting)")},
            "warnings": {"type": "array", "items": _ref("Warning"), "description": (
                "what the reader noticed; code text_answers (with column, row, text, texts) for "
                "item-like columns holding answer texts")},
            "sheet": {"type": ["string", "null"], "description": "the workbook sheet read"},
            "sheets": {"type": "array", "description": "a workbook's sheets and their sizes",
                       "items": {"type": "object", "properties": {
                           "name": {"type": "string"}, "rows": {"type": "integer"},
                           "columns": {"type": "integer"}, "item_like": {"type": "integer"},
                           "chosen": {"type": "boolean"}}}},
            "draft_left_out": {"type": "array", "description": "columns the draft left out, and why",
                               "items": {"type": "object", "properties": {
                                   "column": {"type": "string"}, "reason": {"type": "string"}}}},
            "draft_notes": {"type": "array", "items": {"type": "string"},
                            "description": "what the draft inferred from the answers, to check"},
            "reused": {"type": "boolean", "description": (
                "true when the same tenant had already uploaded these bytes: the earlier "
                "dataset is answered (200) and no second copy is stored")},
        },
    },
    "DatasetList": {
        "type": "object",
        "required": ["datasets", "total"],
        "properties": {"datasets": {"type": "array", "items": _ref("Dataset")},
                       "total": {"type": "integer"}, "limit": {"type": "integer"},
                       "offset": {"type": "integer"}},
    },
    "AnalysisRequest": {
        "type": "object",
        "required": ["dataset_id", "design"],
        "additionalProperties": False,
        "properties": {"dataset_id": {"type": "string"}, "design": _ref("Design"),
                       "options": _ref("Options"),
                       "sources": {"type": "object", "additionalProperties": {"type": "string"},
                                   "description": "the dataset id of each source the design names"}},
    },
    "AnalysisAccepted": {
        "type": "object",
        "required": ["id", "status"],
        "properties": {"id": {"type": "string"}, "status": {"const": "queued"},
                       "dataset_id": {"type": "string"},
                       "created_at": {"type": "string", "format": "date-time"}},
    },
    "Progress": {
        "type": "object",
        "required": ["stage", "done", "total"],
        "properties": {
            "stage": {"type": ["string", "null"],
                      "description": "starting, load, screen, reliability, measurement_model, "
                                     "method_variance, paths, bootstrap, teams, check_corrections, report, done"},
            "done": {"type": "integer"},
            "total": {"type": "integer"},
        },
    },
    "AnalysisSummary": {
        "type": "object",
        "required": ["id", "dataset_id", "status", "progress", "error", "created_at"],
        "properties": {
            "id": {"type": "string"},
            "dataset_id": {"type": "string"},
            "status": {"enum": ["queued", "running", "succeeded", "failed"]},
            "progress": _ref("Progress"),
            "error": _nullable(_ref("ErrorObject")),
            "design": {"type": "object"},
            "options": {"type": "object"},
            "sources": {"type": "object", "additionalProperties": {"type": "string"},
                        "description": "the dataset id of each second source"},
            "attempts": {"type": "integer", "description": "runs started (a restart re-runs)"},
            "created_at": {"type": "string", "format": "date-time"},
            "started_at": {"type": ["string", "null"], "format": "date-time"},
            "finished_at": {"type": ["string", "null"], "format": "date-time"},
        },
    },
    "Analysis": {
        "allOf": [_ref("AnalysisSummary"), {
            "type": "object", "required": ["report"],
            "properties": {"report": _nullable(_ref("Report"))}}],
    },
    "AnalysisList": {
        "type": "object",
        "required": ["analyses", "total"],
        "properties": {"analyses": {"type": "array", "items": _ref("AnalysisSummary")},
                       "total": {"type": "integer"}, "limit": {"type": "integer"},
                       "offset": {"type": "integer"}},
    },
    "Report": {
        "type": "object",
        "description": "report.json, schema samesource.report/1 (docs/report.md).",
        "required": ["schema", "tool", "data", "screening", "constructs", "measurement_model",
                     "method_variance", "paths", "cautions", "warnings"],
        "properties": {
            "schema": {"const": "samesource.report/1"},
            "tool": {"type": "object", "required": ["name", "version"]},
            "data": {"type": "object", "required": ["rows", "rows_analyzed", "items"]},
            "screening": {"type": "object"},
            "constructs": {"type": "object"},
            "measurement_model": {"type": "object"},
            "method_variance": {"type": "object"},
            "paths": {"type": "array", "items": {
                "type": "object", "required": ["outcome", "predictor", "estimates", "preferred"]}},
            "teams": {"type": ["object", "null"], "description": "null without a group_column"},
            "cautions": {"type": "array", "items": {"type": "string"}},
            "warnings": {"type": "array", "items": _ref("Warning")},
            "review_needed": {"type": "boolean",
                              "description": "true when the report may mislead until the design is corrected"},
            "review_reasons": {"type": "array", "items": {
                "type": "object", "required": ["code", "message", "items", "fix"],
                "properties": {"code": {"type": "string"}, "message": {"type": "string"},
                               "items": {"type": "array", "items": {"type": "string"}},
                               "fix": {"type": "string"},
                               "construct": {"type": ["string", "null"]}}}},
        },
    },
    "Health": {
        "type": "object",
        "required": ["status"],
        "properties": {"status": {"enum": ["ok", "unavailable"]},
                       "database": {"type": "string"}, "version": {"type": "string"},
                       "executor": {"type": "string"},
                       "storage": {"enum": ["ok", "unavailable"]},
                       "oldest_queued_seconds": {"type": ["number", "null"],
                                                 "description": "age of the oldest queued analysis"},
                       "disk": {"enum": ["ok", "full", "unavailable"],
                                "description": "full: under SAMESOURCE_MIN_FREE_MB free"},
                       "disk_free_bytes": {"type": "integer"},
                       "runner": {"type": "object", "description": "the job runner: state, "
                                  "workers, workers_alive, heartbeat_alive, running, restarts, "
                                  "storage (ok, unavailable or disk_full at its last step)"}},
    },
}


def document() -> dict:
    not_found = _error("No such object for this tenant (another tenant's id answers the same)")
    paths = {
        "/": {"get": {
            "summary": "The service's start page", "security": [], "operationId": "page",
            "responses": {"200": {"description": "HTML page",
                                  "content": {"text/html": {"schema": {"type": "string"}}}}}}},
        "/healthz": {"get": {
            "summary": "Liveness and database check", "security": [], "operationId": "healthz",
            "responses": {"200": _json(_ref("Health"), "The service and its database answer"),
                          "503": _json(_ref("Health"), "Work cannot run: the database does not "
                                       "answer, the disk is full or no job worker is alive")}}},
        "/v1/datasets": {
            "post": {
                "summary": "Upload a survey file", "operationId": "uploadDataset",
                "requestBody": {"required": True, "content": {"multipart/form-data": {
                    "schema": {"type": "object", "required": ["file"], "properties": {
                        "file": {"type": "string", "contentMediaType": "application/octet-stream",
                                 "description": READABLE + "; the format is recognised from the "
                                                "contents and the name, whatever the part's type"}}},
                    "encoding": {"file": {"contentType": ", ".join(
                        ["application/octet-stream", "application/gzip",
                         *(t for f in READERS for t in f.media_types)])}}}}},
                "responses": {
                    "200": _json(_ref("Dataset"), "The same tenant had uploaded these bytes "
                                 "already: that dataset (reused: true), no second copy stored"),
                    "201": _json(_ref("Dataset"), "Stored; the summary of what was read"),
                    "400": _error("No field 'file' in the form"),
                    **_AUTH_ERRORS,
                    "413": _error("Over the upload limit (SAMESOURCE_MAX_UPLOAD_MB), or (code "
                                  "over_limit) unpacking or reading it would pass "
                                  "SAMESOURCE_MAX_UNPACKED_MB or SAMESOURCE_PARSE_MEMORY_MB; the "
                                  "error's limit names the setting"),
                    "415": _error("Not multipart/form-data, or a file type samesource does not read"),
                    "422": _error("The file cannot be read (the error names row and column), "
                                  "or (code over_limit) it passes a limit on rows, columns, "
                                  "cells, cell or column-name length, or parsing time"),
                    "503": _error("The database does not answer, or the service is overloaded "
                                  "(code overloaded: no request thread, or no parsing slot, "
                                  "SAMESOURCE_MAX_PARSERS, in time; Retry-After)"),
                    "507": _error("The service's disk is full (code insufficient_storage)"),
                }},
            "get": {
                "summary": "This tenant's datasets, newest first", "operationId": "listDatasets",
                "parameters": _PAGE,
                "responses": {"200": _json(_ref("DatasetList"), "The datasets"),
                              "400": _error("Bad limit or offset"), **_AUTH_ERRORS}},
        },
        "/v1/datasets/{id}": {
            "parameters": [_ID],
            "get": {"summary": "One dataset's summary", "operationId": "getDataset",
                    "responses": {"200": _json(_ref("Dataset"), "The dataset"),
                                  **_AUTH_ERRORS, "404": not_found}},
            "delete": {"summary": "Delete a dataset, its stored file and its analyses",
                       "operationId": "deleteDataset",
                       "responses": {"204": {"description": "Deleted"}, **_AUTH_ERRORS,
                                     "404": not_found}},
        },
        "/v1/analyses": {
            "post": {
                "summary": "Start an analysis (runs in the background)",
                "operationId": "createAnalysis",
                "requestBody": {"required": True, "content": {"application/json": {
                    "schema": _ref("AnalysisRequest")}}},
                "responses": {
                    "202": _json(_ref("AnalysisAccepted"), "Queued; poll GET /v1/analyses/{id}"),
                    "400": _error("Malformed JSON, a bad design (field names the design field, "
                                  "e.g. design.constructs.support.items[2]) or bad options "
                                  "(options.NAME)"),
                    **_AUTH_ERRORS,
                    "404": _error("No such dataset for this tenant (field dataset_id)"),
                    "413": _error("Body over the size limit"),
                    "415": _error("Not application/json"),
                    "422": _error("More bootstrap replicates than one analysis may have (code "
                                  "over_limit; SAMESOURCE_MAX_BOOTSTRAP)"),
                    "429": _error("The tenant has too many analyses queued, or too many "
                                  "bootstrap replicates in flight; wait Retry-After seconds"),
                    "503": _error("The database does not answer, or the service is overloaded "
                                   "(Retry-After)"),
                    "507": _error("The service's disk is full (code insufficient_storage)"),
                }},
            "get": {
                "summary": "This tenant's analyses, newest first (without reports)",
                "operationId": "listAnalyses",
                "parameters": _PAGE + [{"name": "dataset_id", "in": "query", "required": False,
                                        "schema": {"type": "string"}}],
                "responses": {"200": _json(_ref("AnalysisList"), "The analyses"),
                              "400": _error("Bad limit or offset"), **_AUTH_ERRORS}},
        },
        "/v1/analyses/{id}": {
            "parameters": [_ID],
            "get": {"summary": "Status, progress, error and (once succeeded) the report",
                    "operationId": "getAnalysis",
                    "responses": {"200": _json(_ref("Analysis"), "The analysis"),
                                  **_AUTH_ERRORS, "404": not_found}},
        },
        "/v1/analyses/{id}/report.json": {
            "parameters": [_ID],
            "get": {"summary": "The report (samesource.report/1)", "operationId": "getReportJson",
                    "responses": {"200": _json(_ref("Report"), "The report"),
                                  **_AUTH_ERRORS, "404": not_found,
                                  "409": _error("Not finished yet (code not_finished) or failed "
                                                "(code analysis_failed)")}},
        },
        "/v1/analyses/{id}/report.html": {
            "parameters": [_ID],
            "get": {"summary": "The report as a web page, where this version has one",
                    "operationId": "getReportHtml",
                    "responses": {"200": {"description": "The report page",
                                          "content": {"text/html": {"schema": {"type": "string"}}}},
                                  **_AUTH_ERRORS,
                                  "404": _error("No such analysis, or (code not_available) no "
                                                "HTML report in this version"),
                                  "409": _error("Not finished yet, or failed")}},
        },
        "/v1/analyses/{id}/tables.xlsx": {
            "parameters": [_ID],
            "get": {"summary": "The report's tables as one workbook (a sheet per table), as the "
                               "command line writes tables.xlsx", "operationId": "getTablesXlsx",
                    "responses": {"200": {"description": "The workbook", "content": {
                        XLSX: {"schema": {"type": "string", "contentMediaType": XLSX}}}},
                                  **_AUTH_ERRORS, "404": not_found,
                                  "409": _error("Not finished yet, or failed")}},
        },
        "/v1/analyses/{id}/tables/{name}.csv": {
            "parameters": [_ID, {"name": "name", "in": "path", "required": True,
                                 "schema": {"type": "string"},
                                 "description": "a table's name, as in the command line's tables/ folder"}],
            "get": {"summary": "One of the report's tables as CSV (UTF-8, a header row)",
                    "operationId": "getTableCsv",
                    "responses": {"200": {"description": "The table", "content": {
                        "text/csv": {"schema": {"type": "string"}}}},
                                  **_AUTH_ERRORS,
                                  "404": _error("No such analysis, or no such table (the message lists them)"),
                                  "409": _error("Not finished yet, or failed")}},
        },
        "/v1/analyses/{id}/brief.html": {
            "parameters": [_ID],
            "get": {"summary": "The one-page brief (print-ready): the decision per key path, "
                               "how far to trust it, the cautions that matter most",
                    "operationId": "getBriefHtml",
                    "responses": {"200": {"description": "The brief page",
                                          "content": {"text/html": {"schema": {"type": "string"}}}},
                                  **_AUTH_ERRORS,
                                  "404": _error("No such analysis, or (code not_available) no "
                                                "brief in this version"),
                                  "409": _error("Not finished yet, or failed")}},
        },
        "/v1/openapi.json": {
            "get": {"summary": "This document", "operationId": "openapi",
                    "responses": {"200": {"description": "OpenAPI 3.1 document",
                                          "content": {"application/json": {
                                              "schema": {"type": "object"}}}},
                                  **_AUTH_ERRORS}},
        },
    }
    return {
        "openapi": "3.1.0",
        "info": {"title": "samesource", "version": __version__,
                 "description": "Reliability, validity and common-method checks for same-source "
                                "survey scales, with corrected path estimates. Every error is "
                                "{\"error\": {\"code\", \"message\", \"field\"}}; unknown routes "
                                "answer 404 and wrong methods 405 in that shape."},
        "servers": [{"url": "/"}],
        "security": [{"bearerAuth": []}],
        "paths": paths,
        "components": {
            "schemas": SCHEMAS,
            "securitySchemes": {"bearerAuth": {"type": "http", "scheme": "bearer",
                                               "description": "samesource token create --tenant NAME"}},
        },
    }


def openapi_json() -> Response:
    return jsonify(document())


def add_routes(bp: Blueprint) -> None:
    bp.add_url_rule("/openapi.json", "openapi", openapi_json, methods=["GET"])
