"""Shared fixtures of the HTTP service's tests (tests/test_service*.py)."""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
POSTGRES_URL = os.environ.get("SAMESOURCE_TEST_POSTGRES_URL")

# `make test` runs on two xdist workers (-n 2 --dist loadgroup). Tests that share one resource
# of the machine carry the same group mark, so they run on one worker, one after another:
# POSTGRES for everything that uses the one real server (each test drops and creates the schema
# in its one database; a resilience test stops and starts the server itself), SYSTEM for
# mounts, fixed ports and files or environment outside the test's own tmp_path.
POSTGRES = pytest.mark.xdist_group("postgres")
SYSTEM = pytest.mark.xdist_group("system")



@pytest.hookimpl(trylast=True)  # after xdist's own hook, which appends "@group" to the node id
def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Refuse to run grouped tests side by side: with pytest 9.2 and xdist 3.8.0 the groups
    were dropped without a word (pytest-xdist issue 1386)."""
    if not getattr(config.option, "loadgroup", False):
        return
    lost = [i.nodeid for i in items if i.get_closest_marker("xdist_group") and "@" not in i.nodeid]
    if lost:
        raise pytest.UsageError(f"--dist loadgroup ignored the xdist_group of {len(lost)} tests "
                                f"(e.g. {lost[0]}): check the pytest / pytest-xdist pins")


# The storage backends a store-level test runs on: SQLite always, the real server when
# SAMESOURCE_TEST_POSTGRES_URL names one (`make test-postgres`; CI starts a server).
BACKENDS = ["sqlite", pytest.param("postgresql", marks=[POSTGRES, pytest.mark.skipif(
    not POSTGRES_URL, reason="set SAMESOURCE_TEST_POSTGRES_URL (make test-postgres)")])]


def small_survey(n: int = 200, seed: int = 3) -> tuple[bytes, dict]:
    """A simulated survey (CSV bytes) and its design: 3 constructs (one a marker) of 3-4
    items, 200 respondents, so an analysis takes a couple of seconds."""
    from simulate import ConstructSpec, SurveySpec, design_for, simulate_survey

    spec = SurveySpec(
        constructs=[ConstructSpec("support", 4, 0.75, 0.3, reverse=[4]),
                    ConstructSpec("engagement", 4, 0.7, 0.3),
                    ConstructSpec("weather", 3, 0.7, 0.3, role="marker", prefix="wth")],
        paths={"engagement": {"support": 0.4}}, n=n, seed=seed)
    df, _truth = simulate_survey(spec)
    return df.to_csv(index=False).encode("utf-8"), design_for(spec)


@pytest.fixture(scope="session")
def svc_survey() -> tuple[bytes, dict]:
    return small_survey()


def wait_for(predicate: Callable[[], object], *, timeout: float, every: float = 0.05,
             what: str = "condition") -> object:
    """Poll until ``predicate()`` is truthy; fail the test after ``timeout`` seconds (a bound
    on a wait, not a speed check). Every 0.05 s: a test waits no longer than what it waits for."""
    deadline = time.monotonic() + timeout
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() > deadline:
            pytest.fail(f"gave up waiting for {what} after {timeout} s")
        time.sleep(every)


def cli(*args: str, env: dict | None = None, timeout: float = 600) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "samesource.service.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=ROOT, timeout=timeout,
                          env={**os.environ, **(env or {})})


@dataclass
class ServerProcess:
    """`samesource serve` in its own process (and process group), on a free loopback port."""

    data_dir: Path
    env: dict = field(default_factory=dict)
    proc: subprocess.Popen | None = None
    base: str = ""
    log_path: Path | None = None

    def start(self) -> ServerProcess:
        self.log_path = self.data_dir.parent / f"{self.data_dir.name}-server-{time.time_ns()}.log"
        log = open(self.log_path, "w")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "samesource.service.cli", "serve", "--host", "127.0.0.1", "--port", "0",
             "--data", str(self.data_dir)],
            stdout=subprocess.PIPE, stderr=log, text=True, cwd=ROOT, start_new_session=True,
            env={**os.environ, **self.env})
        line = self.proc.stdout.readline()  # the announcement, or "" if it died
        m = re.search(r"http://127\.0\.0\.1:(\d+)", line)
        if not m:
            self.stop()
            pytest.fail(f"the server did not start: {line!r}\n{self.log()}")
        self.base = f"http://127.0.0.1:{m.group(1)}"
        return self

    def log(self) -> str:
        return self.log_path.read_text() if self.log_path and self.log_path.exists() else ""

    def kill9(self) -> None:
        """SIGKILL the server process alone (a crash); its job workers notice by themselves."""
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(timeout=30)

    def stop(self) -> None:
        if self.proc is None:
            return
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=30)
        try:  # anything left in the server's own process group
            os.killpg(self.proc.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass
        self.proc.stdout.close()


@pytest.fixture
def server_factory(tmp_path: Path) -> Iterator[Callable[..., ServerProcess]]:
    started: list[ServerProcess] = []

    def make(data_dir: Path | None = None, **env: str) -> ServerProcess:
        s = ServerProcess(data_dir or tmp_path / "data", env=env).start()
        started.append(s)
        return s

    yield make
    for s in started:
        s.stop()


def new_token(data_dir: Path, tenant: str) -> str:
    res = cli("token", "create", "--tenant", tenant, "--data", str(data_dir))
    assert res.returncode == 0, res.stderr
    return res.stdout.strip()


def auth(token: str) -> dict:
    return {"Authorization": f"Bearer {token}"}


def dumps(obj: object) -> str:
    return json.dumps(obj)
