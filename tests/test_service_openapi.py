"""GET /v1/openapi.json: a valid OpenAPI 3.1 document that describes every Flask route,
and real responses (successes and errors) that validate against its schemas."""

from __future__ import annotations

import io
import json
import re
from dataclasses import fields

import jsonschema
import pytest
from conftest import small_survey, wait_for
from openapi_spec_validator import validate
from referencing import Registry, Resource
from referencing.jsonschema import DRAFT202012

from samesource.options import AnalysisOptions
from samesource.service.app import create_app
from samesource.service.context import EXTENSION

URI = "urn:samesource:openapi"


@pytest.fixture(scope="module")
def app(tmp_path_factory):
    app = create_app({"data_dir": tmp_path_factory.mktemp("openapi"), "job_workers": 1})
    yield app
    app.extensions[EXTENSION].close()


@pytest.fixture(scope="module")
def headers(app):
    return {"Authorization": f"Bearer {app.extensions[EXTENSION].store.create_token('docs')}"}


@pytest.fixture(scope="module")
def doc(app, headers):
    r = app.test_client().get("/v1/openapi.json", headers=headers)
    assert r.status_code == 200
    return r.get_json()


def test_the_document_is_valid_openapi_3_1(doc):
    assert doc["openapi"].startswith("3.1")
    validate(doc)


def openapi_path(rule: str) -> str:
    return re.sub(r"<(?:[^:>]+:)?([^>]+)>", lambda m: "{name}" if m.group(1) == "name" else "{id}", rule)


def test_every_flask_route_is_described_and_nothing_else(app, doc):
    routes = {}
    for rule in app.url_map.iter_rules():
        for method in rule.methods - {"HEAD", "OPTIONS"}:
            routes.setdefault(openapi_path(rule.rule), set()).add(method.lower())
    described = {p: {m for m in item if m in ("get", "post", "put", "delete", "patch")}
                 for p, item in doc["paths"].items()}
    assert routes == described
    for path in ("/", "/healthz", "/v1/openapi.json", "/v1/datasets", "/v1/analyses",
                 "/v1/analyses/{id}/report.json", "/v1/analyses/{id}/report.html"):
        assert path in described
    # open routes say so; the rest need the bearer token
    assert doc["paths"]["/"]["get"]["security"] == [] == doc["paths"]["/healthz"]["get"]["security"]
    assert doc["security"] == [{"bearerAuth": []}]


def test_the_options_schema_lists_exactly_the_analysis_options(doc):
    props = doc["components"]["schemas"]["Options"]["properties"]
    assert set(props) == {f.name for f in fields(AnalysisOptions)}


def _pointer(*parts: str) -> str:
    return "/" + "/".join(p.replace("~", "~0").replace("/", "~1") for p in parts)


class Checker:
    """Validates a response against the document's entry for its route, method and status."""

    def __init__(self, doc: dict) -> None:
        self.doc = doc
        self.registry = Registry().with_resource(URI, Resource.from_contents(
            doc, default_specification=DRAFT202012))
        self.seen: set[tuple[str, str, int]] = set()

    def __call__(self, path: str, method: str, resp) -> None:
        op = self.doc["paths"][path][method]
        status = str(resp.status_code)
        assert status in op["responses"], f"{method.upper()} {path} answered {status}, undocumented"
        spec = op["responses"][status]
        self.seen.add((path, method, resp.status_code))
        if "content" not in spec:
            assert resp.get_data() == b""
            return
        assert resp.mimetype in spec["content"], (resp.mimetype, list(spec["content"]))
        if resp.mimetype != "application/json":
            return
        ref = URI + "#" + _pointer("paths", path, method, "responses", status, "content",
                                   "application/json", "schema")
        jsonschema.Draft202012Validator({"$ref": ref}, registry=self.registry,
                                        format_checker=jsonschema.FormatChecker()
                                        ).validate(json.loads(resp.get_data(as_text=True)))


def test_real_responses_validate_against_the_documented_schemas(app, headers, doc):
    c = app.test_client()
    check = Checker(doc)
    data, design = small_survey(n=150, seed=5)

    def upload(body: bytes, name: str = "s.csv", h=headers):
        return c.post("/v1/datasets", headers=h, data={"file": (io.BytesIO(body), name)},
                      content_type="multipart/form-data")

    check("/", "get", c.get("/"))
    check("/healthz", "get", c.get("/healthz"))
    check("/v1/openapi.json", "get", c.get("/v1/openapi.json", headers=headers))
    check("/v1/openapi.json", "get", c.get("/v1/openapi.json"))

    up = upload(data)
    check("/v1/datasets", "post", up)
    ds = up.get_json()
    again = upload(data)  # the same bytes: the same dataset, 200
    check("/v1/datasets", "post", again)
    assert again.status_code == 200 and again.get_json()["id"] == ds["id"] and again.get_json()["reused"]
    check("/v1/datasets", "post", upload(b"\x89PNG\r\n\x1a\n\x00\x00"))
    check("/v1/datasets", "post", upload(b"a,b\n1,2\n3,4,5\n"))
    check("/v1/datasets", "post", c.post("/v1/datasets", headers=headers, data={},
                                         content_type="multipart/form-data"))
    check("/v1/datasets", "post", c.post("/v1/datasets", data={}))
    check("/v1/datasets", "get", c.get("/v1/datasets", headers=headers))
    check("/v1/datasets", "get", c.get("/v1/datasets?limit=-3", headers=headers))
    check("/v1/datasets/{id}", "get", c.get(f"/v1/datasets/{ds['id']}", headers=headers))
    check("/v1/datasets/{id}", "get", c.get("/v1/datasets/ds_none", headers=headers))

    acc = c.post("/v1/analyses", headers=headers, json={"dataset_id": ds["id"], "design": design})
    check("/v1/analyses", "post", acc)
    aid = acc.get_json()["id"]
    check("/v1/analyses", "post", c.post("/v1/analyses", headers=headers, data=b"{",
                                         content_type="application/json"))
    check("/v1/analyses", "post", c.post("/v1/analyses", headers=headers, data=b"{}",
                                         content_type="text/plain"))
    check("/v1/analyses", "post", c.post("/v1/analyses", headers=headers,
                                         json={"dataset_id": "ds_none", "design": design}))
    check("/v1/analyses/{id}", "get", c.get(f"/v1/analyses/{aid}", headers=headers))
    check("/v1/analyses/{id}/report.json", "get",
          c.get(f"/v1/analyses/{aid}/report.json", headers=headers))  # 409 or, if quick, 200

    def finished():
        a = c.get(f"/v1/analyses/{aid}", headers=headers)
        return a if a.get_json()["status"] in ("succeeded", "failed") else None

    done = wait_for(finished, timeout=120, what="the analysis")
    assert done.get_json()["status"] == "succeeded", done.get_json()["error"]
    check("/v1/analyses/{id}", "get", done)
    check("/v1/analyses/{id}", "get", c.get("/v1/analyses/an_none", headers=headers))
    check("/v1/analyses", "get", c.get("/v1/analyses", headers=headers))
    check("/v1/analyses/{id}/report.json", "get",
          c.get(f"/v1/analyses/{aid}/report.json", headers=headers))
    check("/v1/analyses/{id}/report.html", "get",
          c.get(f"/v1/analyses/{aid}/report.html", headers=headers))
    check("/v1/analyses/{id}/report.html", "get",
          c.get("/v1/analyses/an_none/report.html", headers=headers))
    check("/v1/analyses/{id}/tables.xlsx", "get", c.get(f"/v1/analyses/{aid}/tables.xlsx", headers=headers))
    check("/v1/analyses/{id}/tables/{name}.csv", "get",
          c.get(f"/v1/analyses/{aid}/tables/constructs.csv", headers=headers))
    check("/v1/analyses/{id}/tables/{name}.csv", "get",
          c.get(f"/v1/analyses/{aid}/tables/nosuch.csv", headers=headers))
    check("/v1/analyses/{id}/brief.html", "get",
          c.get(f"/v1/analyses/{aid}/brief.html", headers=headers))
    check("/v1/analyses/{id}/brief.html", "get",
          c.get("/v1/analyses/an_none/brief.html", headers=headers))
    check("/v1/datasets/{id}", "delete", c.delete(f"/v1/datasets/{ds['id']}", headers=headers))
    check("/v1/datasets/{id}", "delete", c.delete(f"/v1/datasets/{ds['id']}", headers=headers))

    statuses = {s for _, _, s in check.seen}
    assert {200, 201, 202, 204, 400, 401, 404, 415, 422} <= statuses
    assert {(p, m) for p, m, _ in check.seen} == {
        (p, m) for p, item in doc["paths"].items() for m in item if m != "parameters"}
