"""The start page (/) and the health check (/healthz): the two routes without a token.

The page is plain HTML, CSS and JavaScript from service/static/, inlined into one answer (no
build step, nothing from the network, no extra routes). It keeps the user's token in
sessionStorage and calls the /v1 API with it.
"""

from __future__ import annotations

import functools
from pathlib import Path

from flask import Blueprint, Flask, Response, jsonify

from samesource import __version__

from .context import services
from .security import page_policy

STATIC_DIR = Path(__file__).resolve().parent / "static"


def _read(name: str) -> str:
    return (STATIC_DIR / name).read_text(encoding="utf-8")


@functools.lru_cache(maxsize=1)
def _page() -> tuple[str, str]:
    """The page with its style and script inlined, and its content security policy, which
    allows those two by hash and nothing else inline (service/security.py)."""
    style, script = _read("app.css"), _read("app.js")
    if "</" + "script" in script.lower() or "</" + "style" in style.lower():
        raise RuntimeError("service/static: app.js or app.css closes its own tag")
    html = (_read("index.html").replace("{version}", __version__)
            .replace("{style}", style).replace("{script}", script))
    return html, page_policy(script, style)


def page() -> Response:
    html, csp = _page()
    resp = Response(html, mimetype="text/html")
    resp.headers["Content-Security-Policy"] = csp
    resp.headers["Cache-Control"] = "no-cache"
    return resp


def healthz() -> tuple[Response, int]:
    from .health import health

    body, ok = health(services())
    return jsonify(body), 200 if ok else 503


def register(app: Flask) -> None:
    bp = Blueprint("pages", __name__)
    bp.add_url_rule("/", "page", page, methods=["GET"])
    bp.add_url_rule("/healthz", "healthz", healthz, methods=["GET"])
    app.register_blueprint(bp)
