"""The service over real HTTP on loopback: `samesource serve` in its own process.

End to end against the command line, a kill -9 during an analysis, a bounded load test,
and waitress's own refusals in our JSON error shape.
"""

from __future__ import annotations

import hashlib
import json
import os
import random
import re
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import pandas as pd
import pytest
import requests
from conftest import ROOT, auth, cli, new_token, small_survey, wait_for

SAMPLE = ROOT / "sample_surveys" / "staff_survey.csv"
SAMPLE_DESIGN = ROOT / "sample_surveys" / "staff_survey_design.json"

# Fields of report.json that legitimately differ between the command line and the service
# for the same file, design and options: the name the file is known by (the command line
# labels it from the path it was given, the service by the uploaded name). Nothing else may differ.
DIFFERENT = {("data", "file"), ("timings",)}  # timings: seconds of each run


def upload(base: str, token: str, data: bytes, name: str) -> requests.Response:
    return requests.post(f"{base}/v1/datasets", headers=auth(token),
                         files={"file": (name, data)}, timeout=60)


def run_analysis(base: str, token: str, dataset_id: str, design: dict, options: dict) -> str:
    r = requests.post(f"{base}/v1/analyses", headers=auth(token), timeout=60,
                      json={"dataset_id": dataset_id, "design": design, "options": options})
    assert r.status_code == 202, r.text
    return r.json()["id"]


def poll(base: str, token: str, analysis_id: str, *, timeout: float) -> dict:
    def finished():
        r = requests.get(f"{base}/v1/analyses/{analysis_id}", headers=auth(token), timeout=60)
        assert r.status_code == 200, r.text
        a = r.json()
        return a if a["status"] in ("succeeded", "failed") else None

    return wait_for(finished, timeout=timeout, every=0.1, what=f"analysis {analysis_id}")


def without(report: dict, paths: set[tuple[str, ...]]) -> dict:
    out = json.loads(json.dumps(report))
    for p in paths:
        node = out
        for key in p[:-1]:
            node = node[key]
        node.pop(p[-1])
    return out


def test_http_report_equals_the_command_line_report(server_factory, tmp_path):
    data_dir = tmp_path / "data"
    token = new_token(data_dir, "e2e")
    srv = server_factory(data_dir)
    design = json.loads(SAMPLE_DESIGN.read_text())

    h = requests.get(f"{srv.base}/healthz", timeout=30)
    assert h.status_code == 200 and h.json()["status"] == "ok"
    up = upload(srv.base, token, SAMPLE.read_bytes(), "staff_survey.csv")
    assert up.status_code == 201, up.text
    ds = up.json()
    assert ds["rows"] == 2500 and ds["sha256"] == hashlib.sha256(SAMPLE.read_bytes()).hexdigest()

    aid = run_analysis(srv.base, token, ds["id"], design, {"missing": "fiml"})
    # the command line on the same file and design, meanwhile (two cores)
    out = tmp_path / "cli-report"
    cli_run = subprocess.Popen(
        [sys.executable, "-m", "samesource.service.cli", "analyze", str(SAMPLE), "--design", str(SAMPLE_DESIGN),
         "--missing", "fiml", "--out", str(out), "--quiet"],
        cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    a = poll(srv.base, token, aid, timeout=300)
    assert a["status"] == "succeeded", a["error"]
    rj = requests.get(f"{srv.base}/v1/analyses/{aid}/report.json", headers=auth(token), timeout=60)
    assert rj.status_code == 200 and rj.headers["Content-Type"].startswith("application/json")
    http_report = rj.json()
    assert http_report == a["report"]
    html = requests.get(f"{srv.base}/v1/analyses/{aid}/report.html", headers=auth(token), timeout=60)
    assert html.status_code == 200 and html.headers["Content-Type"].startswith("text/html")

    # small-group protection over HTTP: no team under the minimum size in JSON or HTML
    teams = http_report["teams"]
    sizes = pd.read_csv(SAMPLE)["team"].value_counts()
    small = set(sizes[sizes < teams["min_group_size"]].index)
    assert small and teams["groups_withheld"] == len(small)
    assert {g["group"] for g in teams["group_scores"]}.isdisjoint(small)
    for name in small:
        assert f'"{name}"' not in rj.text and f">{name}<" not in html.text

    _, stderr = cli_run.communicate(timeout=300)
    assert cli_run.returncode == 0, stderr
    cli_report = json.loads((out / "report.json").read_text())

    assert http_report["data"]["file"] == "staff_survey.csv"
    assert without(http_report, DIFFERENT) == without(cli_report, DIFFERENT)
    log = srv.log()
    assert aid in log and ds["id"] in log  # the log names ids and sizes ...
    assert "R00001" not in log and "T120" not in log  # ... never respondents' cells


def _descendants(pid: int) -> set[int]:
    """Every process below ``pid`` (from /proc)."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            stat = Path(f"/proc/{entry}/stat").read_text()
        except OSError:
            continue
        ppid = int(stat.rsplit(")", 1)[1].split()[1])
        children.setdefault(ppid, []).append(int(entry))
    out: set[int] = set()
    todo = [pid]
    while todo:
        for c in children.get(todo.pop(), []):
            if c not in out:
                out.add(c)
                todo.append(c)
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


def test_kill_9_during_an_analysis_then_restart(server_factory, tmp_path):
    data_dir = tmp_path / "data"
    token = new_token(data_dir, "crash")
    env = {"SAMESOURCE_JOB_WORKERS": "1"}
    srv = server_factory(data_dir, **env)
    data, design = small_survey()
    ds = upload(srv.base, token, data, "survey.csv").json()
    aid = run_analysis(srv.base, token, ds["id"], design, {"bootstrap": 120, "seed": 2})

    def in_bootstrap():
        a = requests.get(f"{srv.base}/v1/analyses/{aid}", headers=auth(token), timeout=30).json()
        assert a["status"] in ("queued", "running"), a
        return a["progress"]["stage"] == "bootstrap"

    wait_for(in_bootstrap, timeout=120, every=0.2, what="the bootstrap stage")
    workers = _descendants(srv.proc.pid)
    assert workers, "the analysis should be running in worker processes"
    srv.kill9()
    # the job workers notice that the service is gone and end themselves
    wait_for(lambda: not any(_alive(p) for p in workers), timeout=30,
             what="the killed service's workers to stop")

    again = server_factory(data_dir, **env)
    got = requests.get(f"{again.base}/v1/datasets/{ds['id']}", headers=auth(token), timeout=30)
    assert got.status_code == 200 and got.json()["sha256"] == ds["sha256"]
    a = poll(again.base, token, aid, timeout=240)
    assert a["status"] == "succeeded", a["error"]
    assert a["attempts"] == 2  # interrupted once, run again from the start
    assert a["report"]["paths"][0]["estimates"]["latent"]["bootstrap"]["n_boot"] == 120
    assert "re-queued" in again.log()


def test_concurrent_clients_lose_nothing(server_factory, tmp_path):
    """20 client threads for about 20 s, mixed uploads and reads, against one server."""
    data_dir = tmp_path / "data"
    tokens = [new_token(data_dir, f"load-{i}") for i in range(3)]
    srv = server_factory(data_dir)
    files = [small_survey(n=n, seed=s)[0] for n, s in ((60, 1), (90, 2), (150, 3))]
    accepted: list[tuple[str, str, str]] = []  # (token, id, sha256)
    problems: list[str] = []
    lock = threading.Lock()
    stop_at = time.monotonic() + 20

    def client(i: int) -> None:
        rng = random.Random(i)
        token = tokens[i % len(tokens)]
        mine: list[str] = []
        with requests.Session() as s:
            s.headers.update(auth(token))
            for _ in range(200):  # bounded in count as well as time
                if time.monotonic() > stop_at:
                    break
                roll = rng.random()
                try:
                    if roll < 0.35 or not mine:
                        body = files[rng.randrange(len(files))]
                        r = s.post(f"{srv.base}/v1/datasets", files={"file": ("s.csv", body)},
                                   timeout=60)
                        if r.status_code in (200, 201):  # 200: these bytes again, re-used
                            mine.append(r.json()["id"])
                            with lock:
                                accepted.append((token, r.json()["id"], r.json()["sha256"]))
                            assert r.json()["sha256"] == hashlib.sha256(body).hexdigest()
                    elif roll < 0.65:
                        r = s.get(f"{srv.base}/v1/datasets?limit=20", timeout=60)
                    else:
                        r = s.get(f"{srv.base}/v1/datasets/{rng.choice(mine)}", timeout=60)
                    if r.status_code not in (200, 201):
                        with lock:
                            problems.append(f"{r.request.method} {r.status_code} {r.text[:200]}")
                except requests.RequestException as e:
                    with lock:
                        problems.append(f"{type(e).__name__}: {e}")

    threads = [threading.Thread(target=client, args=(i,)) for i in range(20)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert not problems, problems[:5]
    assert len(accepted) > 20
    for token in tokens:
        expected = {i for t, i, _ in accepted if t == token}
        listed = requests.get(f"{srv.base}/v1/datasets?limit=1000", headers=auth(token),
                              timeout=60).json()
        assert listed["total"] == len(expected)
        assert {d["id"] for d in listed["datasets"]} == expected
    stored = {p.name: p for p in (data_dir / "uploads").rglob("ds_*")}
    assert set(stored) == {i for _, i, _ in accepted}
    for _, i, sha in accepted:
        assert hashlib.sha256(stored[i].read_bytes()).hexdigest() == sha
    assert not list((data_dir / "uploads").rglob(".incoming-*"))


def _raw(base: str, request: bytes) -> tuple[int, dict, dict]:
    host, port = re.match(r"http://([^:]+):(\d+)", base).groups()
    with socket.create_connection((host, int(port)), timeout=30) as s:
        s.sendall(request)
        chunks = []
        while True:
            block = s.recv(65536)
            if not block:
                break
            chunks.append(block)
    raw = b"".join(chunks)
    head, _, body = raw.partition(b"\r\n\r\n")
    lines = head.decode("latin-1").split("\r\n")
    headers = dict(line.split(": ", 1) for line in lines[1:] if ": " in line)
    return int(lines[0].split()[1]), headers, json.loads(body)


def test_the_http_server_refuses_oversized_and_malformed_requests_in_json(server_factory,
                                                                          tmp_path):
    data_dir = tmp_path / "data"
    token = new_token(data_dir, "raw")
    srv = server_factory(data_dir, SAMESOURCE_MAX_UPLOAD_MB="1")
    # a declared body of 10 GB is refused once the headers are read, before any body is sent
    status, headers, body = _raw(srv.base, (
        "POST /v1/datasets HTTP/1.1\r\nHost: 127.0.0.1\r\n"
        f"Authorization: Bearer {token}\r\n"
        "Content-Type: multipart/form-data; boundary=x\r\n"
        "Content-Length: 10000000000\r\n\r\n").encode())
    assert status == 413 and headers["Content-Type"] == "application/json"
    assert body["error"]["code"] == "too_large" and body["error"]["field"] is None
    status, headers, body = _raw(srv.base, b"GARBAGE\r\n\r\n")
    assert status == 400 and body["error"]["code"] == "bad_request"
    # a file just over the limit (body under the server's cap) is refused by the app
    over = b"a,b\n" + b"1,2\n" * 270_000  # 1.08 MB
    r = upload(srv.base, token, over, "big.csv")
    assert r.status_code == 413 and r.json()["error"]["code"] == "too_large"
    assert requests.get(f"{srv.base}/v1/datasets", headers=auth(token), timeout=30).json()["total"] == 0


def test_token_create_prints_the_token_alone(tmp_path):
    data_dir = tmp_path / "data"
    first = cli("token", "create", "--tenant", "north", "--data", data_dir)
    second = cli("token", "create", "--tenant", "north", "--data", data_dir)
    for res in (first, second):
        assert res.returncode == 0, res.stderr
        assert re.fullmatch(r"ss1_[0-9a-f]{16}_[A-Za-z0-9_-]{43}\n", res.stdout)
    assert first.stdout != second.stdout
    env_dir = cli("token", "create", "--tenant", "south", env={"SAMESOURCE_DATA_DIR": str(data_dir)})
    assert env_dir.returncode == 0
    assert (data_dir / "samesource.sqlite3").exists()


@pytest.mark.parametrize("env, words", [
    ({"SAMESOURCE_EXECUTOR": "threads"}, "SAMESOURCE_EXECUTOR"),
    ({"SAMESOURCE_MAX_UPLOAD_MB": "lots"}, "SAMESOURCE_MAX_UPLOAD_MB"),
    ({"SAMESOURCE_DATABASE_URL": "not a url"}, "SAMESOURCE_DATABASE_URL"),
])
def test_bad_configuration_stops_serve_with_one_clear_message(tmp_path, env, words):
    res = cli("serve", "--port", "0", "--data", tmp_path / "d", env=env, timeout=60)
    assert res.returncode == 2
    assert words in res.stderr and "Traceback" not in res.stderr
