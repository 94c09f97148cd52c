"""Analyses on a real Dask distributed cluster (a LocalCluster on 127.0.0.1) give the same
reports as the local process pool, bootstrap included."""

from __future__ import annotations

import io
import time

import pytest
from conftest import wait_for

from samesource.service.app import create_app
from samesource.service.context import EXTENSION
from samesource.service.dask_backend import DaskExecutor

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def cluster():
    # worker processes, as on a real cluster (they import samesource afresh, like the local pool)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  protocol="tcp://", host="127.0.0.1",
                                  dashboard_address=None) as c:
        yield c


@pytest.fixture(scope="module")
def client(cluster):
    with distributed.Client(cluster.scheduler_address, set_as_default=False) as c:
        yield c


def square(x: int) -> int:
    return x * x


def fails_on_three(x: int) -> int:
    if x == 3:
        raise ValueError("three")
    return x


def test_dask_executor_keeps_order_and_reraises(client):
    ex = DaskExecutor(client)
    assert ex.workers == 2
    assert ex.map(square, range(25)) == [x * x for x in range(25)]
    assert ex.map(square, []) == []
    with pytest.raises(ValueError, match="three"):
        ex.map(fails_on_three, range(6))


def test_dask_executor_inside_a_task_fans_out_on_the_cluster(client):
    def job(n: int) -> tuple[list[int], int]:
        ex = DaskExecutor()  # inside a task: borrows the worker's client
        return ex.map(square, list(range(n))), ex.workers

    values, workers = client.submit(job, 12, pure=False).result(timeout=60)
    assert values == [x * x for x in range(12)] and workers == 2


def differences(a, b, path: str = "") -> list[str]:
    """Where two JSON values differ (for the failure message)."""
    if isinstance(a, dict) and isinstance(b, dict):
        return [d for k in sorted(set(a) | set(b))
                for d in differences(a.get(k), b.get(k), f"{path}.{k}")]
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        return [d for i, (x, y) in enumerate(zip(a, b, strict=True)) for d in differences(x, y, f"{path}[{i}]")]
    return [] if a == b else [f"{path}: {a!r} != {b!r}"]


def upload_and_start(app, data: bytes, design: dict, options: dict):
    """Client, auth headers, dataset id and analysis id of a fresh upload and analysis."""
    c = app.test_client()
    h = {"Authorization": f"Bearer {app.extensions[EXTENSION].store.create_token('dask')}"}
    ds = c.post("/v1/datasets", headers=h, data={"file": (io.BytesIO(data), "survey.csv")},
                content_type="multipart/form-data").get_json()
    aid = c.post("/v1/analyses", headers=h, json={"dataset_id": ds["id"], "design": design,
                                                    "options": options}).get_json()["id"]
    return c, h, ds["id"], aid


def quick_survey() -> tuple[bytes, dict]:
    """Two 3-item scales, 200 rows: the analysis reaches its bootstrap within seconds."""
    from simulate import ConstructSpec, SurveySpec, design_for, simulate_survey

    spec = SurveySpec(constructs=[ConstructSpec("support", 3, 0.75, 0.3),
                                  ConstructSpec("engagement", 3, 0.7, 0.3)],
                      paths={"engagement": {"support": 0.4}}, n=200, seed=3)
    df, _truth = simulate_survey(spec)
    return df.to_csv(index=False).encode("utf-8"), design_for(spec)


def run_through_service(config: dict, data: bytes, design: dict, options: dict) -> tuple[dict, set]:
    app = create_app(config)
    svc = app.extensions[EXTENSION]
    try:
        c, h, _, aid = upload_and_start(app, data, design, options)
        stages: set = set()

        def done():
            a = c.get(f"/v1/analyses/{aid}", headers=h).get_json()
            stages.add(a["progress"]["stage"])
            return a if a["status"] in ("succeeded", "failed") else None

        a = wait_for(done, timeout=240, every=0.1, what="the analysis")
        assert a["status"] == "succeeded", a["error"]
        return a["report"], stages
    finally:
        svc.close()


def test_an_analysis_on_the_cluster_equals_the_local_pool(cluster, client, tmp_path):
    data, design = quick_survey()
    options = {"bootstrap": 30, "seed": 4}
    address = cluster.scheduler_address.replace("tcp://", "dask://")
    on_dask, dask_stages = run_through_service(
        {"data_dir": tmp_path / "dask", "executor": address}, data, design, options)
    local, _ = run_through_service({"data_dir": tmp_path / "local"}, data, design, options)
    on_dask_timings = on_dask.pop("timings")  # the seconds of each run differ, nothing else
    local.pop("timings")
    assert on_dask == local, differences(on_dask, local)[:10]
    assert on_dask_timings["bootstrap"] > 0
    boot = on_dask["paths"][0]["estimates"]["latent"]["bootstrap"]
    assert boot["n_boot"] == 30 and boot["seed"] == 4
    # progress written from the cluster's events while it ran
    assert dask_stages & {"load", "screen", "reliability", "measurement_model",
                          "method_variance", "paths", "bootstrap", "report"}
    # the job ran on the cluster (its progress events) and so did the replicates
    events = [msg for _ts, msg in client.get_events("samesource-progress")]
    assert any(m["stage"] == "bootstrap" for m in events)
    prefixes = set(cluster.scheduler.task_prefixes)
    assert "run_chunk" in prefixes, prefixes
    assert "samesource" in prefixes, prefixes


STOP_SECONDS = 2.0  # the promise of docs/reliability.md, "Prompt stop"


def test_deleting_the_dataset_stops_its_analysis_on_the_cluster(cluster, client, tmp_path,
                                                                monkeypatch):
    # A bootstrap on the cluster (batches of minutes); the dataset is deleted inside a batch.
    # Cancelling a Dask future leaves a running task running: the job task and its batch
    # tasks must each see the run's stop flag, and the cluster be idle within 2 s.
    from samesource.service import dask_backend

    monkeypatch.setattr(dask_backend, "FLAG_KEEP_SECONDS", 2.0)  # 60 s in service
    data, design = quick_survey()
    address = cluster.scheduler_address.replace("tcp://", "dask://")
    app = create_app({"data_dir": tmp_path / "dask", "executor": address, "job_workers": 1})
    svc = app.extensions[EXTENSION]
    try:
        c, h, dataset_id, aid = upload_and_start(app, data, design, {"bootstrap": 20_000, "seed": 1})

        def in_bootstrap():
            a = c.get(f"/v1/analyses/{aid}", headers=h).get_json()
            assert a["status"] in ("queued", "running"), a
            return a["progress"]["stage"] == "bootstrap"

        def busy() -> int:  # tasks running on the workers, the seceded job task included
            n = client.run(lambda dask_worker: len(dask_worker.state.executing)
                           + len(dask_worker.state.long_running))
            return sum(n.values())

        wait_for(in_bootstrap, timeout=240, every=0.1, what="the bootstrap to start")
        wait_for(lambda: busy() >= 3, timeout=60, every=0.1, what="the batches to run")
        time.sleep(0.7)  # inside a batch
        t0 = time.monotonic()
        assert c.delete(f"/v1/datasets/{dataset_id}", headers=h).status_code == 204
        wait_for(lambda: busy() == 0 and svc.runner.state()["running"] == 0, timeout=120,
                 every=0.05, what="the cluster's workers to stop the run")
        took = time.monotonic() - t0
        print(f"run stopped on the cluster {took:.2f} s after the delete")
        assert took < STOP_SECONDS, f"the deleted analysis ran {took:.2f} s on on the cluster"
        mine = [m for _ts, m in client.get_events("samesource-progress") if m["analysis_id"] == aid]
        boot = [m for m in mine if m["stage"] == "bootstrap"]
        assert boot and max(m["done"] for m in boot) < boot[0]["total"], boot
        assert not any(m["stage"] == "report" for m in mine)

        def flags_cleared():
            return not client.run_on_scheduler(
                lambda dask_scheduler: [k for k in dask_scheduler.extensions["events"]._events
                                        if str(k).startswith("samesource-stop-")])

        # kept FLAG_KEEP_SECONDS for batch tasks that have not asked yet, then cleared
        wait_for(flags_cleared, timeout=30, every=0.1, what="the stop flag to be cleared")
    finally:
        svc.close()
