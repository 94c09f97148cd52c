"""The start page (/) and the health check (/healthz): the two routes without a token."""

from __future__ import annotations

import logging

from flask import Blueprint, Flask, Response, jsonify

from measurement import __version__

from .context import services
from .errors import safe_trace

log = logging.getLogger("samesource.service")

PAGE = """<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>samesource</title>
<style>
 body {{ font-family: system-ui, sans-serif; max-width: 44rem; margin: 2rem auto; padding: 0 1rem;
        line-height: 1.5; color: #222; }}
 code, pre {{ background: #f4f4f4; border-radius: 3px; }}
 pre {{ padding: .75rem; overflow-x: auto; }}
</style>
</head>
<body>
<h1>samesource</h1>
<p>Reliability, validity and common-method checks for survey scales answered by the same
people, with key paths re-estimated under each correction. Version {version}.</p>
<h2>Use the API</h2>
<ol>
 <li>Get a token from whoever runs this service (<code>samesource token create --tenant NAME</code>).</li>
 <li>Upload a survey file (.csv, .tsv, .txt, .xlsx or .sav):
<pre>curl -H "Authorization: Bearer $TOKEN" -F file=@survey.csv {base}/v1/datasets</pre></li>
 <li>Start an analysis with your study design, then poll it:
<pre>curl -H "Authorization: Bearer $TOKEN" -H "Content-Type: application/json" \\
     -d '{{"dataset_id": "ds_...", "design": {{...}}}}' {base}/v1/analyses
curl -H "Authorization: Bearer $TOKEN" {base}/v1/analyses/an_...</pre></li>
 <li>Read the report: <code>/v1/analyses/ID/report.json</code>.</li>
</ol>
<p>Every route is described in <code>/v1/openapi.json</code> (it needs the token too).
Service health: <a href="/healthz">/healthz</a>.</p>
<p><small>Survey scores describe groups; they are not for decisions about individuals.
Statistical remedies bound common-method bias, they do not remove it.</small></p>
</body>
</html>
"""


def page() -> Response:
    return Response(PAGE.format(version=__version__, base=""), mimetype="text/html")


def healthz() -> tuple[Response, int]:
    svc = services()
    body = {"status": "ok", "database": svc.store.db.dialect, "version": __version__,
            "executor": svc.config.executor}
    try:
        svc.store.db.ping()
    except Exception as e:
        log.error("health check: database unavailable: %s", safe_trace(e))
        body["status"] = "unavailable"
        return jsonify(body), 503
    return jsonify(body), 200


def register(app: Flask) -> None:
    bp = Blueprint("pages", __name__)
    bp.add_url_rule("/", "page", page, methods=["GET"])
    bp.add_url_rule("/healthz", "healthz", healthz, methods=["GET"])
    app.register_blueprint(bp)
