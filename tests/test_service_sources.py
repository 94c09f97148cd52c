"""Second sources over HTTP: "sources" {NAME: dataset_id} in POST /v1/analyses, each a dataset
of the same tenant (404 otherwise), one per source of the design (400 otherwise); the run
joins them; deleting a source's dataset deletes the analyses that used it.

Data: tests/two_sources.py (simulated, invented)."""

from __future__ import annotations

import io

import pytest
from conftest import wait_for
from test_service_api import assert_error
from two_sources import two_source_survey

from samesource.service.app import create_app
from samesource.service.context import EXTENSION

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")


@pytest.fixture(scope="module")
def app(tmp_path_factory):
    app = create_app({"data_dir": tmp_path_factory.mktemp("sources-data"), "job_workers": 1})
    yield app
    app.extensions[EXTENSION].close()


@pytest.fixture(scope="module")
def client(app):
    return app.test_client()


@pytest.fixture(scope="module")
def files():
    staff, managers, design = two_source_survey(400, seed=5)
    return staff.to_csv(index=False).encode(), managers.to_csv(index=False).encode(), design


def headers(app, tenant: str) -> dict:
    return {"Authorization": f"Bearer {app.extensions[EXTENSION].store.create_token(tenant)}"}


def upload(client, h, data: bytes, name: str) -> dict:
    r = client.post("/v1/datasets", headers=h, data={"file": (io.BytesIO(data), name)},
                    content_type="multipart/form-data")
    assert r.status_code in (200, 201), r.get_json()
    return r.get_json()


def test_an_analysis_joins_its_sources_and_deleting_a_source_deletes_it(app, client, files):
    staff, managers, design = files
    h = headers(app, "two-sources")
    main = upload(client, h, staff, "staff.csv")
    boss = upload(client, h, managers, "managers.csv")
    r = client.post("/v1/analyses", headers=h, json={"dataset_id": main["id"], "design": design,
                                                      "options": {"bootstrap": 0},
                                                      "sources": {"manager": boss["id"]}})
    assert r.status_code == 202, r.get_json()
    aid = r.get_json()["id"]

    def done():
        a = client.get(f"/v1/analyses/{aid}", headers=h).get_json()
        return a if a["status"] in ("succeeded", "failed") else None

    a = wait_for(done, timeout=180, what="the two-source analysis")
    assert a["status"] == "succeeded", a["error"]
    assert a["sources"] == {"manager": boss["id"]}
    link = a["report"]["data"]["sources"]["manager"]
    assert link["file"] == "managers.csv" and link["matched"] + link["unmatched_main_rows"] == 400
    kinds = {(p["outcome"], p["predictor"]): p["sources"]["kind"] for p in a["report"]["paths"]}
    assert kinds[("performance", "engagement")] == "cross_source"
    assert kinds[("engagement", "support")] == "same_source"
    assert client.delete(f"/v1/datasets/{boss['id']}", headers=h).status_code == 204
    assert_error(client.get(f"/v1/analyses/{aid}", headers=h), 404, "not_found")


def test_sources_must_be_the_tenants_datasets_and_match_the_design(app, client, files):
    staff, managers, design = files
    h, other = headers(app, "checks"), headers(app, "someone-else")
    main = upload(client, h, staff, "staff.csv")
    boss = upload(client, h, managers, "managers.csv")
    theirs = upload(client, other, managers, "managers.csv")

    def post(sources, des=design):
        body = {"dataset_id": main["id"], "design": des}
        if sources is not None:
            body["sources"] = sources
        return client.post("/v1/analyses", headers=h, json=body)

    assert_error(post({"manager": theirs["id"]}), 404, "not_found", "sources.manager")
    assert_error(post(None), 400, "bad_request", "sources.manager")
    assert_error(post({"manager": boss["id"], "peer": boss["id"]}), 400, "bad_request", "sources.peer")
    assert_error(post(["manager"]), 400, "bad_request", "sources")
    # the main file as the managers' file: it has neither their id column nor their items
    err = assert_error(post({"manager": main["id"]}), 400, "bad_design")
    assert err["field"].startswith("design.") and "staff.csv" in err["message"]
