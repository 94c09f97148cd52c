"""Uploads sent at the same moment: identical bytes are parsed and stored once, parsing
children are bounded (SAMESOURCE_MAX_PARSERS), and the command line's out-of-memory message."""

from __future__ import annotations

import io
import json
import threading
import time

import pytest
from conftest import small_survey

from samesource.service import cli, uploads
from samesource.service.app import create_app
from samesource.service.context import EXTENSION
from samesource.service.upload_gate import Busy, ParseSlots, SameBytes

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")


@pytest.fixture
def make_app(tmp_path):
    made = []

    def make(**cfg):
        app = create_app({"data_dir": tmp_path / f"data{len(made)}", "run_jobs": False, **cfg})
        made.append(app)
        return app

    yield make
    for app in made:
        app.extensions[EXTENSION].close()


def headers(app, tenant: str = "acme") -> dict:
    return {"Authorization": f"Bearer {app.extensions[EXTENSION].store.create_token(tenant)}"}


def upload(app, hdrs, data: bytes, name: str = "survey.csv"):
    return app.test_client().post("/v1/datasets", headers=hdrs, content_type="multipart/form-data",
                                  data={"file": (io.BytesIO(data), name)})


def slow_parsing(monkeypatch, seconds: float = 0.0, gate: threading.Event | None = None) -> list:
    """parse_bounded, counted, each call held for ``seconds`` or until ``gate`` is set."""
    calls: list[float] = []
    real = uploads.parse_bounded

    def parse(*args, **kwargs):
        calls.append(time.monotonic())
        if gate is not None:
            assert gate.wait(30)
        time.sleep(seconds)
        return real(*args, **kwargs)

    monkeypatch.setattr(uploads, "parse_bounded", parse)
    return calls


def at_once(n: int, fn) -> list:
    out: list = [None] * n

    def run(i: int) -> None:
        out[i] = fn(i)

    threads = [threading.Thread(target=run, args=(i,)) for i in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    return out


def stored_files(app) -> list[str]:
    root = app.extensions[EXTENSION].config.uploads_dir
    return sorted(p.name for p in root.rglob("*") if p.is_file())


def test_identical_uploads_at_the_same_moment_are_parsed_and_stored_once(make_app, monkeypatch):
    app = make_app()
    h = headers(app)
    data, _ = small_survey(60)
    calls = slow_parsing(monkeypatch, seconds=0.5)  # the others arrive while the first parses
    answers = at_once(4, lambda i: upload(app, h, data, name=f"copy{i}.csv"))
    codes = sorted(r.status_code for r in answers)
    assert codes == [200, 200, 200, 201], [r.get_json() for r in answers]
    ids = {r.get_json()["id"] for r in answers}
    assert len(ids) == 1 and len(calls) == 1
    # the duplicates answer as a later one does: 200, reused, the dataset's Location
    (dataset_id,) = ids
    for r in answers:
        if r.status_code == 200:
            assert r.get_json()["reused"] is True
            assert r.headers["Location"] == f"/v1/datasets/{dataset_id}"
    assert len(stored_files(app)) == 1
    # a different tenant's same bytes are its own dataset, and different bytes are not held up
    assert upload(app, headers(app, "other"), data).status_code == 201


def test_the_same_bytes_stored_by_another_process_meanwhile_are_reused(make_app, monkeypatch):
    # Another service process on the same database may store the bytes between this one's
    # check and its write: the write itself finds them, and this upload answers that dataset.
    app = make_app()
    h = headers(app)
    data, _ = small_survey(60)
    first = upload(app, h, data)
    assert first.status_code == 201
    store = app.extensions[EXTENSION].store
    monkeypatch.setattr(store, "find_dataset_by_sha256", lambda *_a: None)  # the check missed it
    again = upload(app, h, data)
    assert again.status_code == 200, again.get_json()
    assert again.get_json()["id"] == first.get_json()["id"] and again.get_json()["reused"] is True
    assert len(stored_files(app)) == 1  # its own copy removed


def test_same_bytes_locks_are_per_key_and_forgotten():
    gate = SameBytes()
    order: list[str] = []

    def other(key: str) -> None:
        with gate.holding("t", key):
            order.append(key)

    with gate.holding("t", "a"):
        same, different = threading.Thread(target=other, args=("a",)), threading.Thread(
            target=other, args=("b",))
        same.start()
        different.start()
        different.join(5)
        time.sleep(0.2)
        assert order == ["b"]  # another key is not held up; the same key waits
    same.join(5)
    assert order == ["b", "a"]
    assert gate._held == {}  # forgotten once nobody holds or waits


def test_parse_slots_bound_the_children_and_a_long_wait_is_busy():
    slots = ParseSlots(2, wait_seconds=0.2)
    with slots.taken(), slots.taken():
        t0 = time.monotonic()
        with pytest.raises(Busy) as e:
            with slots.taken():
                pass
        assert e.value.waited >= 0.19 and time.monotonic() - t0 < 5
    with slots.taken():  # given back
        pass


def test_an_upload_waiting_too_long_for_a_parsing_slot_is_503_overloaded(make_app, monkeypatch):
    app = make_app(max_parsers=1, max_queue_seconds=0.3)
    assert app.extensions[EXTENSION].parse_slots.size == 1
    h = headers(app)
    gate = threading.Event()
    calls = slow_parsing(monkeypatch, gate=gate)
    first: list = []
    t = threading.Thread(target=lambda: first.append(upload(app, h, small_survey(60, seed=1)[0])))
    t.start()
    try:
        deadline = time.monotonic() + 30
        while not calls and time.monotonic() < deadline:  # the first holds the only slot
            time.sleep(0.02)
        r = upload(app, h, small_survey(60, seed=2)[0])
        assert r.status_code == 503, r.get_json()
        err = r.get_json()["error"]
        assert err["code"] == "overloaded" and "SAMESOURCE_MAX_PARSERS" in err["message"]
        assert r.headers["Retry-After"] == "2"
    finally:
        gate.set()
        t.join(60)
    assert first[0].status_code == 201
    assert upload(app, h, small_survey(60, seed=2)[0]).status_code == 201  # a slot again
    assert len(calls) == 2  # the refused upload was never parsed


def test_max_parsers_is_a_setting_of_at_least_one(make_app):
    from samesource.service.config import ConfigError, load_config

    assert load_config(env={}).max_parsers == 2
    assert load_config(env={"SAMESOURCE_MAX_PARSERS": "3"}).max_parsers == 3
    with pytest.raises(ConfigError, match="SAMESOURCE_MAX_PARSERS"):
        load_config(env={"SAMESOURCE_MAX_PARSERS": "0"})


def test_the_command_line_names_the_memory_limit_when_a_workbook_exhausts_memory(tmp_path, capsys,
                                                                                monkeypatch):
    # The workbook reader reports any failure inside openpyxl as "cannot open the Excel
    # workbook"; raised while handling a MemoryError, the command line says what ran out.
    from samesource.errors import DataError
    from samesource.input import loading

    def exhausted(*_a, **_k):
        try:
            raise MemoryError
        except MemoryError as e:
            raise DataError(f"cannot open the Excel workbook ({e.__class__.__name__}); check that "
                            "the file is complete", file="big.xlsx") from None

    monkeypatch.setattr(loading, "_read_xlsx", exhausted)
    book = tmp_path / "big.xlsx"
    book.write_bytes(b"PK\x03\x04" + b"\0" * 100)
    design = tmp_path / "design.json"
    design.write_text('{"constructs": {"a": {"items": ["q1", "q2", "q3"]}}}')
    code = cli.main(["analyze", str(book), "--design", str(design), "--out", str(tmp_path / "o"),
                     "--quiet"])
    err = capsys.readouterr().err
    assert code == cli.EXIT_BAD_INPUT
    assert "MemoryError" not in err and "ran out of memory" in err, err
    assert "big.xlsx" in err and "MB" in err and ".csv or .parquet" in err
    # an ordinary workbook that cannot be opened keeps its own message
    monkeypatch.setattr(loading, "_read_xlsx", lambda *_a, **_k: (_ for _ in ()).throw(
        DataError("cannot open the Excel workbook (BadZipFile)", file="big.xlsx")))
    assert cli.main(["analyze", str(book), "--design", str(design), "--out", str(tmp_path / "o"),
                     "--quiet"]) == cli.EXIT_BAD_INPUT
    assert "cannot open the Excel workbook (BadZipFile)" in capsys.readouterr().err


def test_the_size_read_a_block_at_a_time_is_a_number_of_megabytes_or_refused(tmp_path, monkeypatch, capsys):
    # a typo must not quietly read every file in memory: refused when the service starts, and
    # by the command line before it reads the file
    from samesource.errors import InputError
    from samesource.pipeline import STREAM_BYTES, stream_bytes
    from samesource.service.config import ConfigError, load_config

    assert stream_bytes({}) == STREAM_BYTES and stream_bytes({"SAMESOURCE_STREAM_MB": "0"}) == 0
    assert stream_bytes({"SAMESOURCE_STREAM_MB": " 1.5 "}) == int(1.5 * 2**20)
    for bad in ("abc", "-1", "nan", "inf", "256MB"):
        with pytest.raises(InputError, match="SAMESOURCE_STREAM_MB must be a number of megabytes"):
            stream_bytes({"SAMESOURCE_STREAM_MB": bad})
        with pytest.raises(ConfigError, match="SAMESOURCE_STREAM_MB"):
            load_config(env={"SAMESOURCE_STREAM_MB": bad})
    from conftest import small_survey

    from samesource.service.cli import main

    data, design = small_survey(200, 3)
    (tmp_path / "s.csv").write_bytes(data)
    (tmp_path / "d.json").write_text(json.dumps(design))
    monkeypatch.setenv("SAMESOURCE_STREAM_MB", "lots")
    assert main(["analyze", str(tmp_path / "s.csv"), "--design", str(tmp_path / "d.json"),
                 "--out", str(tmp_path / "out")]) != 0
    assert "SAMESOURCE_STREAM_MB must be a number of megabytes" in capsys.readouterr().err
