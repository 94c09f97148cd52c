"""`make demo`, second step: the HTTP service as a client uses it (standard library only).

Starts `samesource serve` on a free loopback port with its embedded defaults in a temporary
data folder, makes a token, uploads the sample survey and the managers' ratings of the same
staff (a second source), starts an analysis of both, polls it, prints
the preferred estimate of every key path, saves the report, and stops the service.

    python -m samesource.service.demo_client [--keep]   # --keep: leave the service running, print how to stop it
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
import uuid
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SURVEY = ROOT / "sample_surveys" / "staff_survey.csv"
DESIGN = ROOT / "sample_surveys" / "staff_survey_two_sources_design.json"
MANAGERS = ROOT / "sample_surveys" / "manager_ratings.csv"
OPTIONS = {"missing": "fiml"}
SAVED = ROOT / "samesource-report" / "report-http.json"


# ---------------------------------------------------------------------- the client


class Client:
    def __init__(self, base: str, token: str) -> None:
        self.base = base
        self.token = token

    def call(self, method: str, path: str, body: bytes | None = None,
             content_type: str | None = None) -> tuple[int, dict]:
        req = urllib.request.Request(self.base + path, data=body, method=method)
        req.add_header("Authorization", f"Bearer {self.token}")
        if content_type:
            req.add_header("Content-Type", content_type)
        try:
            with urllib.request.urlopen(req, timeout=60) as resp:
                return resp.status, json.loads(resp.read() or b"null")
        except urllib.error.HTTPError as e:  # our errors are JSON too
            return e.code, json.loads(e.read() or b"null")

    def upload(self, path: Path) -> dict:
        boundary = uuid.uuid4().hex
        body = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; "
                f"filename=\"{path.name}\"\r\nContent-Type: application/octet-stream\r\n\r\n"
                ).encode() + path.read_bytes() + f"\r\n--{boundary}--\r\n".encode()
        status, out = self.call("POST", "/v1/datasets", body,
                                f"multipart/form-data; boundary={boundary}")
        if status != 201:
            raise SystemExit(f"upload refused ({status}): {out['error']['message']}")
        return out

    def analyse(self, dataset_id: str, design: dict, options: dict, sources: dict | None = None) -> str:
        body = json.dumps({"dataset_id": dataset_id, "design": design, "options": options,
                           "sources": sources or {}})
        status, out = self.call("POST", "/v1/analyses", body.encode(), "application/json")
        if status != 202:
            raise SystemExit(f"analysis refused ({status}): {out['error']['message']}")
        return out["id"]

    def wait(self, analysis_id: str, timeout: float = 600) -> dict:
        deadline = time.monotonic() + timeout
        last = None
        while time.monotonic() < deadline:
            _, a = self.call("GET", f"/v1/analyses/{analysis_id}")
            p = a["progress"]
            shown = f"  {a['status']}: {p['stage'] or '-'} {p['done']}/{p['total']}"
            if shown != last:
                print(shown, flush=True)
                last = shown
            if a["status"] in ("succeeded", "failed"):
                return a
            time.sleep(0.5)
        raise SystemExit(f"the analysis did not finish within {timeout:.0f} s")


def print_paths(report: dict) -> None:
    print("\nKey paths (preferred estimate, standardized, with its interval):")
    for p in report["paths"]:
        method = p["preferred"]
        e = p["estimates"][method]
        ci = e.get("ci") or [None, None]
        ci_text = f"[{ci[0]:.3f}, {ci[1]:.3f}]" if None not in ci else "[no interval]"
        kind = " cross-source" if (p.get("sources") or {}).get("kind") == "cross_source" else ""
        print(f"  {p['predictor']:>12} -> {p['outcome']:<15} {e['estimate']:+.3f} {ci_text}"
              f"  ({method}){kind}")


# ---------------------------------------------------------------------- the service


def start_service(data_dir: Path) -> tuple[subprocess.Popen, str]:
    proc = subprocess.Popen(
        [sys.executable, "-m", "samesource.service.cli", "serve", "--host", "127.0.0.1", "--port", "0",
         "--data", str(data_dir)],
        stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, cwd=ROOT)
    line = proc.stdout.readline()
    m = re.search(r"(http://127\.0\.0\.1:\d+)", line)
    if not m:
        proc.kill()
        raise SystemExit(f"the service did not start: {line!r}")
    return proc, m.group(1)


def make_token(data_dir: Path, tenant: str) -> str:
    res = subprocess.run([sys.executable, "-m", "samesource.service.cli", "token", "create", "--tenant", tenant,
                          "--data", str(data_dir)], capture_output=True, text=True, cwd=ROOT,
                         check=True)
    return res.stdout.strip()


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m samesource.service.demo_client")
    ap.add_argument("--keep", action="store_true", help="leave the service running afterwards")
    args = ap.parse_args(argv)

    data_dir = Path(tempfile.mkdtemp(prefix="samesource-demo-"))
    token = make_token(data_dir, "demo")
    proc, base = start_service(data_dir)
    print(f"Service: {base} (data in {data_dir})")
    try:
        client = Client(base, token)
        ds = client.upload(SURVEY)
        print(f"Uploaded {ds['name']}: {ds['rows']} rows, {len(ds['columns'])} columns "
              f"({ds['id']})")
        managers = client.upload(MANAGERS)
        print(f"Uploaded {managers['name']}: {managers['rows']} rows (second source 'manager', {managers['id']})")
        aid = client.analyse(ds["id"], json.loads(DESIGN.read_text(encoding="utf-8")), OPTIONS,
                             {"manager": managers["id"]})
        print(f"Analysis {aid} queued; polling:")
        a = client.wait(aid)
        if a["status"] != "succeeded":
            print(f"The analysis failed: {a['error']['message']}", file=sys.stderr)
            return 1
        print_paths(a["report"])
        SAVED.parent.mkdir(parents=True, exist_ok=True)
        SAVED.write_text(json.dumps(a["report"], indent=2, ensure_ascii=False), encoding="utf-8")
        print(f"\nReport: {base}/v1/analyses/{aid}/report.json")
        print(f"        {base}/v1/analyses/{aid}/report.html")
        print(f"Saved a copy to {SAVED.relative_to(ROOT)}"
              + ("" if args.keep else " (the service stops now; --keep leaves it running)"))
        if args.keep:
            print(f"\nThe service keeps running (pid {proc.pid}); token: {token}\n"
                  f"Stop it with: kill {proc.pid}")
            return 0
    finally:
        if not args.keep:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                proc.kill()
            shutil.rmtree(data_dir, ignore_errors=True)
            print("Service stopped.")
    return 0


if __name__ == "__main__":
    os.environ.setdefault("PYTHONUNBUFFERED", "1")
    sys.exit(main())
