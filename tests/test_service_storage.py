"""Storage: the same tests on the embedded SQLite and, when SAMESOURCE_TEST_POSTGRES_URL names
one (`make test-postgres`; CI starts a server), on a real PostgreSQL server."""

from __future__ import annotations

import io
import threading
from datetime import timedelta

import pytest
from conftest import BACKENDS, POSTGRES_URL, small_survey, wait_for
from sqlalchemy import select, text, update

from samesource.service import tokens
from samesource.service.app import create_app
from samesource.service.context import EXTENSION
from samesource.service.db import Database
from samesource.service.models import Analysis, Base, utcnow
from samesource.service.store import Claim, Store


@pytest.fixture(params=BACKENDS)
def store(request, tmp_path):
    if request.param == "sqlite":
        db = Database(f"sqlite:///{tmp_path / 'test.sqlite3'}")
    else:
        db = Database(POSTGRES_URL)
        Base.metadata.drop_all(db.engine)  # a clean schema for each test
    db.create_schema()
    yield Store(db)
    if request.param != "sqlite":
        Base.metadata.drop_all(db.engine)
    db.dispose()


def add_dataset(store: Store, tenant_id: str, name: str = "s.csv") -> dict:
    from samesource.service.store import new_id

    return store.add_dataset(tenant_id, new_id("ds"), name=name, format="csv", sha256="0" * 64,
                             size_bytes=10, rows=3, columns=["a", "b"], numeric_columns=["a"],
                             draft_design={"constructs": {}, "paths": []}, warnings=[],
                             stored_path=f"uploads/{tenant_id}/{name}")


def tenant(store: Store, name: str) -> tuple[str, str]:
    token = store.create_token(name)
    return token, store.tenant_for_token(token)["id"]


def all_cells(store: Store) -> str:
    """Every value of every table, as text."""
    out = []
    with store.db.engine.connect() as c:
        for table in Base.metadata.sorted_tables:
            for row in c.execute(table.select()):
                out.extend(str(v) for v in row)
    return "\n".join(out)


def test_sqlite_runs_in_wal_mode(tmp_path):
    db = Database(f"sqlite:///{tmp_path / 'w.sqlite3'}")
    db.create_schema()
    with db.engine.connect() as c:
        assert c.execute(text("PRAGMA journal_mode")).scalar() == "wal"
        assert c.execute(text("PRAGMA foreign_keys")).scalar() == 1
    db.dispose()


def test_tokens_are_stored_only_hashed(store):
    token = store.create_token("quernmoor-hr")
    again = store.create_token("quernmoor-hr")  # a second token, same tenant
    assert token != again
    t1, t2 = store.tenant_for_token(token), store.tenant_for_token(again)
    assert t1 == t2 and t1["name"] == "quernmoor-hr"
    key_id = tokens.key_id_of(token)
    cells = all_cells(store)
    for t in (token, again):
        assert t not in cells
        assert t[len("ss1_") + 17:] not in cells  # nor its secret part alone
    assert key_id in cells and tokens.token_hash(token) in cells
    # near misses are refused
    assert store.tenant_for_token(token[:-1] + ("A" if token[-1] != "A" else "B")) is None
    assert store.tenant_for_token("ss1_" + key_id + "_" + "x" * 43) is None
    assert store.tenant_for_token("") is None and store.tenant_for_token("garbage") is None


def test_every_read_is_scoped_to_its_tenant(store):
    _, a = tenant(store, "a")
    _, b = tenant(store, "b")
    ds = add_dataset(store, a)
    assert store.get_dataset(a, ds["id"])["name"] == "s.csv"
    assert store.get_dataset(b, ds["id"]) is None
    assert store.delete_dataset(b, ds["id"]) is None
    an = store.add_analysis(a, ds["id"], {"constructs": {}}, {"bootstrap": 0})
    assert store.get_analysis(b, an["id"]) is None
    assert store.get_analysis(a, an["id"])["status"] == "queued"
    assert store.list_datasets(b, limit=10, offset=0) == ([], 0)
    assert store.list_analyses(b, dataset_id=None, limit=10, offset=0) == ([], 0)
    rows, total = store.list_datasets(a, limit=10, offset=0)
    assert total == 1 and rows[0]["id"] == ds["id"]


def test_an_id_with_a_nul_character_is_simply_not_found(store):
    # From a URL such as /v1/datasets/a%00b: PostgreSQL refused the query (a 500), as its
    # text cannot hold NUL; found by tests/test_fuzz_inputs.py.
    _, a = tenant(store, "nul")
    ds = add_dataset(store, a)
    store.add_analysis(a, ds["id"], {"constructs": {}}, {})
    for bad in ("a\x00b", ds["id"] + "\x00"):
        assert store.get_dataset(a, bad) is None and store.delete_dataset(a, bad) is None
        assert store.get_analysis(a, bad) is None
        assert store.list_analyses(a, dataset_id=bad, limit=10, offset=0) == ([], 0)
    assert store.get_dataset(a, ds["id"]) is not None


def test_deleting_a_dataset_deletes_its_analyses(store):
    _, a = tenant(store, "a")
    ds, other = add_dataset(store, a, "one.csv"), add_dataset(store, a, "two.csv")
    ids = [store.add_analysis(a, ds["id"], {}, {})["id"] for _ in range(3)]
    kept = store.add_analysis(a, other["id"], {}, {})["id"]
    gone = store.delete_dataset(a, ds["id"])
    assert sorted(gone["analysis_ids"]) == sorted(ids)
    assert all(store.get_analysis(a, i) is None for i in ids)
    assert store.get_analysis(a, kept) is not None
    assert store.count_datasets() == 1


def test_claims_are_exclusive_across_threads(store):
    _, a = tenant(store, "a")
    ds = add_dataset(store, a)
    ids = {store.add_analysis(a, ds["id"], {}, {})["id"] for _ in range(12)}
    got: list[Claim] = []
    lock = threading.Lock()

    def worker(i: int) -> None:
        while (c := store.claim_next(f"host:{i}:x")) is not None:
            with lock:
                got.append(c)

    threads = [threading.Thread(target=worker, args=(i,)) for i in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert sorted(c.analysis_id for c in got) == sorted(ids)  # each exactly once
    assert all(c.attempt == 1 for c in got)
    assert store.counts_by_status() == {"running": 12}


def test_progress_and_results_are_written_only_by_the_run_that_owns_them(store):
    _, a = tenant(store, "a")
    ds = add_dataset(store, a)
    aid = store.add_analysis(a, ds["id"], {}, {})["id"]
    claim = store.claim_next("h:1:a")
    assert claim.analysis_id == aid
    assert store.set_progress(claim, "bootstrap", 3, 10)
    got = store.get_analysis(a, aid)
    assert got["status"] == "running" and got["progress"] == {"stage": "bootstrap", "done": 3, "total": 10}
    stale = Claim(aid, claim.attempt, "h:2:b")  # someone else's idea of the run
    assert not store.set_progress(stale, "report", 9, 10)
    assert not store.finish(stale, report="{}")
    assert store.finish(claim, report='{"schema": "samesource.report/1"}')
    done = store.get_analysis(a, aid, with_report=True)
    assert done["status"] == "succeeded" and done["report_text"].startswith("{")
    assert done["finished_at"] is not None
    assert not store.set_progress(claim, "late", 1, 1)  # finished: no more writes


def test_recovery_requeues_orphans_and_fails_them_after_max_attempts(store):
    _, a = tenant(store, "a")
    ds = add_dataset(store, a)
    dead, live, stale = (store.add_analysis(a, ds["id"], {}, {})["id"] for _ in range(3))
    c_dead = store.claim_next("h:dead:1")
    c_live = store.claim_next("h:live:1")
    c_stale = store.claim_next("h:quiet:1")
    assert [c.analysis_id for c in (c_dead, c_live, c_stale)] == [dead, live, stale]
    with store.db.writing() as s:  # the quiet runner's heartbeat is old
        s.execute(update(Analysis).where(Analysis.id == stale)
                  .values(heartbeat_at=utcnow() - timedelta(seconds=600)))
    out = store.recover(lease_seconds=60, max_attempts=3, runner_is_dead=lambda r: ":dead:" in r)
    assert sorted(out["requeued"]) == sorted([dead, stale]) and out["failed"] == []
    assert store.get_analysis(a, live)["status"] == "running"
    assert store.get_analysis(a, dead)["status"] == "queued"

    # interrupted again and again: after max_attempts it fails with the reason
    for attempt in (2, 3):
        c = store.claim_next("h:dead:2")
        assert c.attempt == attempt
        out = store.recover(lease_seconds=60, max_attempts=3, runner_is_dead=lambda r: ":dead:" in r)
    assert c.analysis_id in out["failed"]
    failed = store.get_analysis(a, c.analysis_id)
    assert failed["status"] == "failed" and failed["error"]["code"] == "interrupted"
    assert "3 times" in failed["error"]["message"]


def test_release_hands_back_without_counting_an_attempt(store):
    _, a = tenant(store, "a")
    ds = add_dataset(store, a)
    aid = store.add_analysis(a, ds["id"], {}, {})["id"]
    c = store.claim_next("h:1:a")
    assert store.release(c)
    again = store.claim_next("h:1:b")
    assert again.analysis_id == aid and again.attempt == 1
    assert store.release_for_retry(again)
    third = store.claim_next("h:1:c")
    assert third.attempt == 2


def test_json_and_timestamps_round_trip(store):
    _, a = tenant(store, "ü-tenant ✓")
    ds = add_dataset(store, a, "Umfrage_ß.csv")
    design = {"constructs": {"Unterstützung": {"items": ["u1", "u2"]}}, "paths": []}
    an = store.add_analysis(a, ds["id"], design, {"confidence": 0.9})
    got = store.get_analysis(a, an["id"])
    assert got["design"] == design and got["options"] == {"confidence": 0.9}
    assert got["created_at"].endswith("Z")
    assert store.get_dataset(a, ds["id"])["name"] == "Umfrage_ß.csv"
    with store.db.reading() as s:
        assert s.scalar(select(Analysis.status).where(Analysis.id == an["id"])) == "queued"


def test_the_service_runs_an_analysis_on_this_database(store, tmp_path):
    """Upload, queue, run in the worker pool (which writes progress itself), report."""
    url = store.db.url
    app = create_app({"data_dir": tmp_path / "d", "database_url": None if url.startswith("sqlite")
                      else url, "job_workers": 1})
    try:
        c = app.test_client()
        h = {"Authorization": f"Bearer {app.extensions[EXTENSION].store.create_token('db')}"}
        data, design = small_survey(n=150, seed=9)
        ds = c.post("/v1/datasets", headers=h, data={"file": (io.BytesIO(data), "s.csv")},
                    content_type="multipart/form-data").get_json()
        aid = c.post("/v1/analyses", headers=h,
                     json={"dataset_id": ds["id"], "design": design}).get_json()["id"]
        stages = set()

        def done():
            a = c.get(f"/v1/analyses/{aid}", headers=h).get_json()
            stages.add(a["progress"]["stage"])
            return a if a["status"] in ("succeeded", "failed") else None

        a = wait_for(done, timeout=120, every=0.05, what="the analysis")
        assert a["status"] == "succeeded", a["error"]
        assert a["report"]["data"]["rows"] == 150
        assert stages - {None, "starting", "done"}, stages  # progress came from the worker
        assert app.extensions[EXTENSION].store.db.dialect == store.db.dialect
    finally:
        app.extensions[EXTENSION].close()


def test_the_same_bytes_stored_at_the_same_moment_are_stored_once(store):
    # Several connections at once (as several service processes on one database): the check
    # and the insert are one write transaction, so exactly one dataset is stored.
    from samesource.service.store import new_id

    _, a = tenant(store, "acme")
    _, b = tenant(store, "other")
    results: list = []

    def add(tenant_id: str) -> None:
        results.append(store.add_dataset_once(
            tenant_id, new_id("ds"), sha256="1" * 64, name="s.csv", format="csv", size_bytes=10,
            rows=3, columns=["a"], numeric_columns=["a"], draft_design={}, warnings=[],
            stored_path="uploads/x"))

    threads = [threading.Thread(target=add, args=(a,)) for _ in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert sorted(created for _, created in results) == [False] * 5 + [True]
    assert len({ds["id"] for ds, _ in results}) == 1
    assert store.list_datasets(a, limit=10, offset=0)[1] == 1
    add(b)  # another tenant's same bytes are its own
    assert results[-1][1] is True and results[-1][0]["id"] != results[0][0]["id"]
