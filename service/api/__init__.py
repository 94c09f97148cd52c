"""The versioned HTTP API (/v1): datasets, analyses, reports and the OpenAPI document."""

from __future__ import annotations

from flask import Blueprint, Flask

from . import analyses, auth, datasets, openapi


def register(app: Flask) -> None:
    bp = Blueprint("v1", __name__, url_prefix="/v1")
    bp.before_request(auth.require_token)
    datasets.add_routes(bp)
    analyses.add_routes(bp)
    openapi.add_routes(bp)
    app.register_blueprint(bp)
