"""Chaos and load runs against `samesource serve` (docs/reliability.md records the figures).

    .venv/bin/python tests/benchmarks/chaos.py [--kills 100] [--requests 10000] [--clients 50]

* kill -9 loop: each round starts the server, uploads a file, queues an analysis with a
  bootstrap, waits a random moment and kills the server with SIGKILL; at the end one server
  runs everything left. Every accepted upload must read back byte for byte and every
  analysis must end (none left queued or running).
* generated requests: random, often hostile, requests on every route; no answer may be 5xx.
* concurrent clients: N threads uploading (each upload a different file: the rows shuffled)
  and reading it back at once; every request answered within the client's timeout, a 503
  `overloaded` (with Retry-After, which the client honours) counted apart from errors.

The suite runs a short version of each (tests/test_service_resilience.py).
"""

from __future__ import annotations

import argparse
import hashlib
import random
import sys
import threading
import time
from pathlib import Path

import requests

ROOT = Path(__file__).resolve().parents[2]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "sample_surveys"))  # the simulator, for tests.conftest

from tests.conftest import ServerProcess, auth, new_token, small_survey  # noqa: E402

TIMEOUT = 60


def _get(url: str, token: str) -> dict:
    return requests.get(url, headers=auth(token), timeout=TIMEOUT).json()


def variant(csv: bytes, k: int) -> bytes:
    """The same survey with its data rows in the ``k``-th shuffled order (``k`` = 0: as is):
    other bytes, so the service stores and parses it anew instead of answering the dataset
    it already has for those bytes."""
    if k == 0:
        return csv
    header, *rows = csv.rstrip(b"\n").split(b"\n")
    random.Random(k).shuffle(rows)
    return b"\n".join([header, *rows]) + b"\n"


def kill9_loop(data_dir: Path, rounds: int, *, seed: int = 0, env: dict | None = None,
               bootstrap: int = 60) -> dict:
    """``rounds`` kill -9 restarts under load; the figures of the run."""
    rng = random.Random(seed)
    env = {"SAMESOURCE_JOB_WORKERS": "1", **(env or {})}
    token = new_token(data_dir, "chaos")
    data, design = small_survey(n=150)
    uploads: dict[str, str] = {}
    analyses: list[str] = []
    refused: dict[int, int] = {}
    for r in range(rounds):
        srv = ServerProcess(data_dir, env=env).start()
        try:
            body = variant(data, r)  # a new file each round (the same bytes would be re-used)
            resp = requests.post(f"{srv.base}/v1/datasets", headers=auth(token), timeout=TIMEOUT,
                                 files={"file": (f"round{r}.csv", body)})
            if resp.status_code == 201:
                uploads[resp.json()["id"]] = hashlib.sha256(body).hexdigest()
                a = requests.post(f"{srv.base}/v1/analyses", headers=auth(token), timeout=TIMEOUT,
                                  json={"dataset_id": resp.json()["id"], "design": design,
                                        "options": {"bootstrap": bootstrap, "seed": r}})
                if a.status_code == 202:
                    analyses.append(a.json()["id"])
                else:  # e.g. 429: the tenant's queue is full (SAMESOURCE_TENANT_MAX_QUEUED)
                    refused[a.status_code] = refused.get(a.status_code, 0) + 1
            time.sleep(rng.uniform(0.2, 2.5))
        finally:
            srv.kill9()
            srv.stop()
    srv = ServerProcess(data_dir, env=env).start()
    try:
        deadline = time.monotonic() + 120 + 20 * len(analyses)
        statuses: dict[str, dict] = {}
        while time.monotonic() < deadline:
            statuses = {a: _get(f"{srv.base}/v1/analyses/{a}", token) for a in analyses}
            if all(s["status"] in ("succeeded", "failed") for s in statuses.values()):
                break
            time.sleep(1.0)
        identical = sum(_get(f"{srv.base}/v1/datasets/{d}", token).get("sha256") == sha
                        for d, sha in uploads.items())
        return {"rounds": rounds, "uploads_accepted": len(uploads), "uploads_identical": identical,
                "analyses": len(analyses), "analyses_refused": refused,
                "succeeded": sum(s["status"] == "succeeded" for s in statuses.values()),
                "failed": sum(s["status"] == "failed" for s in statuses.values()),
                "stuck": sum(s["status"] in ("queued", "running") for s in statuses.values()),
                "max_attempts_seen": max((s.get("attempts", 0) for s in statuses.values()),
                                         default=0)}
    finally:
        srv.stop()


def generated_requests(base: str, token: str, n: int, *, seed: int = 0) -> dict:
    """``n`` random requests on every route (bad ids, bad bodies, bad types, no token)."""
    rng = random.Random(seed)
    junk = ["", "x" * 5000, "../../etc/passwd", "ds_" + "0" * 24, "\u0000", "%00", "{}", "[]",
            "null", "1e999", '{"dataset_id": 1}', '{"design": {"constructs": []}}']
    routes = [("GET", "/v1/datasets/{j}"), ("DELETE", "/v1/datasets/{j}"),
              ("GET", "/v1/analyses/{j}"), ("GET", "/v1/analyses/{j}/report.json"),
              ("GET", "/v1/analyses/{j}/report.html"), ("POST", "/v1/analyses"),
              ("POST", "/v1/datasets"), ("GET", "/v1/datasets?limit={j}"), ("GET", "/healthz")]
    counts: dict[int, int] = {}
    for _ in range(n):
        method, route = rng.choice(routes)
        j = rng.choice(junk)
        url = base + route.replace("{j}", requests.utils.quote(j, safe=""))
        headers = auth(token) if rng.random() < 0.9 else {}
        kwargs: dict = {}
        if method == "POST" and route.endswith("analyses"):
            kwargs = {"data": j.encode("utf-8", "surrogatepass"),
                      "headers": {**headers, "Content-Type": "application/json"}}
        elif method == "POST":
            kwargs = {"files": {"file": ("f.csv", j.encode() * rng.randint(0, 50))},
                      "headers": headers}
        else:
            kwargs = {"headers": headers}
        status = requests.request(method, url, timeout=TIMEOUT, **kwargs).status_code
        counts[status] = counts.get(status, 0) + 1
    return {"requests": n, "5xx": sum(v for k, v in counts.items() if k >= 500),
            "statuses": dict(sorted(counts.items()))}


class Overloaded(Exception):
    """A 503 with Retry-After: a prompt refusal, not an error."""

    def __init__(self, retry_after: float) -> None:
        self.retry_after = retry_after


def concurrent_clients(base: str, token: str, clients: int, seconds: float) -> dict:
    base_data, _design = small_survey(n=100)
    errors: list[str] = []
    done = [0]
    overloaded = [0]
    slowest = [0.0]
    counter = iter(range(1, 10**9))
    lock = threading.Lock()
    stop = time.monotonic() + seconds

    def timed(method: str, url: str, **kw) -> requests.Response:
        t0 = time.monotonic()
        try:
            r = requests.request(method, url, headers=auth(token), timeout=TIMEOUT, **kw)
        finally:
            with lock:
                slowest[0] = max(slowest[0], time.monotonic() - t0)
        if r.status_code == 503 and r.headers.get("Retry-After"):
            raise Overloaded(float(r.headers["Retry-After"]))
        return r

    def client(i: int) -> None:
        while time.monotonic() < stop:
            with lock:
                data = variant(base_data, next(counter))
            try:
                r = timed("POST", f"{base}/v1/datasets", files={"file": (f"c{i}.csv", data)})
                if r.status_code not in (200, 201):  # 200: the same bytes again, re-used
                    raise RuntimeError(f"upload {r.status_code}")
                g = timed("GET", f"{base}/v1/datasets/{r.json()['id']}")
                if g.status_code != 200 or g.json()["sha256"] != hashlib.sha256(data).hexdigest():
                    raise RuntimeError(f"read back {g.status_code}")
                with lock:
                    done[0] += 1
            except Overloaded as o:  # what a client should do: wait as asked, then again
                with lock:
                    overloaded[0] += 1
                time.sleep(o.retry_after)
            except Exception as e:  # counted, not raised: the figure is the count
                with lock:
                    errors.append(str(e)[:80])

    threads = [threading.Thread(target=client, args=(i,)) for i in range(clients)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return {"clients": clients, "seconds": seconds, "round_trips": done[0],
            "overloaded_503": overloaded[0], "errors": len(errors),
            "slowest_answer_seconds": round(slowest[0], 1),
            "first_error": errors[0] if errors else None}


def _load() -> str:
    """The machine's load averages, printed beside every figure (the machine is shared)."""
    import os

    return "load {:.2f} {:.2f} {:.2f}".format(*os.getloadavg())


def main() -> int:
    import tempfile

    p = argparse.ArgumentParser()
    p.add_argument("--kills", type=int, default=100)
    p.add_argument("--requests", type=int, default=10_000)
    p.add_argument("--clients", type=int, default=50)
    p.add_argument("--seconds", type=float, default=30.0)
    args = p.parse_args()
    print(f"start: {_load()}", flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.monotonic()
        if args.kills:
            print("kill -9 loop:", kill9_loop(Path(tmp) / "kill", args.kills),
                  f"({time.monotonic() - t0:.0f} s; {_load()})", flush=True)
        if not (args.requests or args.clients):
            return 0
        data_dir = Path(tmp) / "load"
        token = new_token(data_dir, "load")
        srv = ServerProcess(data_dir, env={"SAMESOURCE_JOB_WORKERS": "1"}).start()
        try:
            t0 = time.monotonic()
            if args.requests:
                print("generated requests:", generated_requests(srv.base, token, args.requests),
                      f"({time.monotonic() - t0:.0f} s; {_load()})", flush=True)
            if args.clients:
                print("concurrent clients:", concurrent_clients(srv.base, token, args.clients,
                                                                args.seconds), f"({_load()})",
                      flush=True)
        finally:
            srv.stop()
    return 0


if __name__ == "__main__":
    sys.exit(main())
