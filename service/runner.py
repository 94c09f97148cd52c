"""The job runner: takes queued analyses from the database and runs them outside the request.

The queue is the analyses table itself (status "queued"), so an accepted analysis survives
any crash. A few dispatcher threads each claim the oldest queued analysis (an atomic
conditional UPDATE, so several service processes on one PostgreSQL database never take the
same one), hand it to a backend and wait for its outcome:

* :class:`LocalBackend`: local job processes (the executor's :class:`LocalExecutor`, one
  process group each); the job writes progress to the database itself (it has the database
  URL), and its bootstrap takes its share of the service's one cap on processes;
* :class:`samesource.service.dask_backend.DaskBackend`: the job runs on a Dask cluster and sends
  progress back as cluster events, which this process writes.

Every write for a run is conditioned on (analysis id, runner, attempt, status running), so a
run that lost its claim (its dataset was deleted, or it was taken for dead and re-queued)
cannot overwrite anything; its next progress call stops it.

Recovery: a runner is identified as HOST:PID:NONCE and writes a heartbeat for its running
analyses. At start-up and then periodically, analyses left "running" by a runner that is
gone (a dead process on this machine, or no heartbeat for the lease) go back to the queue,
or fail with the reason once they were interrupted ``max_attempts`` times.
"""

from __future__ import annotations

import logging
import os
import secrets
import socket
import threading
import time
from concurrent.futures import Future
from pathlib import Path
from typing import Protocol

from samesource.executor import (
    LocalExecutor,
    WorkerBudget,
    WorkerLost,
    limit_workers,
    process_alive,
    stop_when,
)

from .config import ServiceConfig
from .errors import safe_trace
from .faults import is_disk_full, is_transient, retrying
from .jobs import JobSpec, Outcome
from .store import Claim, Store

log = logging.getLogger("samesource.runner")

POLL_SECONDS = 2.0  # dispatchers look for queued analyses at least this often


class Backend(Protocol):
    name: str

    def submit(self, spec: JobSpec) -> Future: ...

    def close(self) -> None: ...


# ---------------------------------------------------------------------- local process pool


_WORKER_STORE: Store | None = None


def _init_local_worker(database_url: str, budget: WorkerBudget | None = None) -> None:
    """Runs once in each job process, after the executor's set-up (its own process group,
    ended whole when the service is gone, so a killed service leaves no analysis running
    behind it): its own database connection for progress, and the service's one budget of
    processes for its bootstrap pool."""
    global _WORKER_STORE
    from .db import Database

    if budget is not None:
        limit_workers(budget)
    _WORKER_STORE = Store(Database(database_url))


def _run_local(spec: JobSpec) -> Outcome:
    from .jobs import Cancelled, run_job

    store = _WORKER_STORE
    assert store is not None, "the pool initializer did not run"
    claim = Claim(spec.analysis_id, spec.attempt, spec.runner)

    def progress(stage: str, done: int, total: int) -> None:
        if not store.set_progress(claim, stage, done, total):
            raise Cancelled(spec.analysis_id)

    def gone() -> bool:  # asked between bootstrap batches; storage down: keep going
        try:
            return not store.owns(claim)
        except Exception:
            return False

    with stop_when(gone):  # the job's place in the budget is held by LocalBackend.submit
        return run_job(spec, progress, executor=None)  # bootstrap: measurement's default pool


class LocalBackend:
    """Jobs in local processes: a :class:`samesource.executor.LocalExecutor` with one
    process group per job process (a dead one's bootstrap processes end with it), and one
    :class:`samesource.executor.WorkerBudget` of ``max_processes`` shared by the jobs'
    bootstrap pools."""

    name = "local"

    def __init__(self, workers: int, database_url: str, max_processes: int | None = None) -> None:
        budget = WorkerBudget(max_processes or max(1, os.cpu_count() or 1))
        # a job needs nothing from the service's main script (the console script, or a test
        # runner), so it is not imported again; BLAS threads are left to the job (blas_threads)
        self._pool = LocalExecutor(workers, blas_threads=None, own_groups=True,
                                   initializer=_init_local_worker, initargs=(database_url, budget))
        self.budget = budget

    def submit(self, spec: JobSpec) -> Future:
        # The place is taken and given back here, in the service's process: a job process ended
        # by kill (a deleted dataset, a dead owner) would never give it back itself, and every
        # later job would then bootstrap on a smaller share.
        self.budget.enter()
        try:
            fut = self._pool.submit(_run_local, spec)
        except BaseException:
            self.budget.leave()
            raise
        fut.add_done_callback(lambda _f: self.budget.leave())
        return fut

    def worker_pids(self) -> list[int]:
        return self._pool.worker_pids()

    def close(self) -> None:
        # Jobs still running were handed back to the queue: end them now.
        self._pool.terminate()


# ---------------------------------------------------------------------- the runner


def runner_identity() -> str:
    return f"{socket.gethostname()}:{os.getpid()}:{secrets.token_hex(4)}"


def runner_is_dead(runner: str) -> bool:
    """True when ``runner`` (HOST:PID:NONCE) was a process on this machine that has ended.
    Runners elsewhere, or a live process, are left to the heartbeat lease."""
    try:
        host, pid, _nonce = runner.rsplit(":", 2)
        pid_n = int(pid)
    except ValueError:
        return True
    if host != socket.gethostname() or pid_n == os.getpid():
        return False
    return not process_alive(pid_n)


class JobRunner:
    """Dispatcher threads that take queued analyses and hand them to a backend, supervised.

    Every step that touches storage is retried with backoff while the error is transient
    (:mod:`samesource.service.faults`); a result that cannot be saved within
    ``storage_retry_seconds`` goes back to the queue with its attempt counted, and a
    dispatcher or the heartbeat thread that ends anyway is started again by the other
    thread (and by each health check). :meth:`state` is what /healthz reports.
    """

    def __init__(self, store: Store, config: ServiceConfig, backend: Backend) -> None:
        self.store = store
        self.config = config
        self.backend = backend
        self.identity = runner_identity()
        self._active: dict[str, Claim] = {}
        self._active_lock = threading.Lock()
        self._wake = threading.Condition()
        self._stopping = threading.Event()
        self._threads: dict[str, threading.Thread] = {}
        self._threads_lock = threading.Lock()
        self._started = False
        self.restarts = 0  # threads the supervisor started again
        self._storage_error: str | None = None  # None: the last storage step succeeded
        self._storage_error_since: float | None = None

    # -- life cycle

    def start(self) -> None:
        try:
            self._recover()
        except Exception as e:  # the database may be down at start: recovery runs again later
            log.warning("recovery at start failed: %s", safe_trace(e))
        self._started = True
        self.ensure_threads()
        log.info("job runner %s started: %s backend, %d at once (%d per tenant)", self.identity,
                 self.backend.name, self.config.workers, self.config.running_per_tenant)

    def ensure_threads(self) -> None:
        """Start every dispatcher and the heartbeat thread that is not alive (supervision)."""
        if not self._started or self._stopping.is_set():
            return
        wanted = {f"samesource-dispatch-{i}": self._dispatch_loop for i in range(self.config.workers)}
        wanted["samesource-heartbeat"] = self._maintenance_loop
        with self._threads_lock:
            for name, target in wanted.items():
                old = self._threads.get(name)
                if old is not None and old.is_alive():
                    continue
                if old is not None:
                    self.restarts += 1
                    log.error("job runner thread %s had stopped; started again", name)
                t = threading.Thread(target=target, name=name, daemon=True)
                t.start()
                self._threads[name] = t

    def notify(self) -> None:
        """A new analysis was queued."""
        with self._wake:
            self._wake.notify()

    def stop(self) -> None:
        """Stop taking work; running analyses go back to the queue for the next start."""
        if self._stopping.is_set():
            return
        self._stopping.set()
        with self._wake:
            self._wake.notify_all()
        with self._active_lock:
            claims = list(self._active.values())
        for c in claims:
            try:
                retrying(lambda c=c: self.store.release(c), what="handing an analysis back",
                         within=5.0)
            except Exception as e:
                log.warning("analysis %s not handed back: %s", c.analysis_id, safe_trace(e))
        self.backend.close()
        log.info("job runner %s stopped; %d running analyses re-queued", self.identity, len(claims))

    # -- health

    def state(self) -> dict:
        """Workers alive, restarts, what runs, whether storage answered at the last step."""
        self.ensure_threads()
        with self._threads_lock:
            alive = sum(t.is_alive() for n, t in self._threads.items() if "dispatch" in n)
            beat = self._threads.get("samesource-heartbeat")
        with self._active_lock:
            running = len(self._active)
        out = {"state": "stopped" if self._stopping.is_set() else "running",
               "workers": self.config.workers, "workers_alive": alive,
               "heartbeat_alive": bool(beat and beat.is_alive()), "running": running,
               "restarts": self.restarts, "storage": "ok" if self._storage_error is None
               else self._storage_error}
        if self._storage_error_since is not None:
            out["storage_failing_seconds"] = round(time.monotonic() - self._storage_error_since, 1)
        return out

    def _storage_failed(self, e: BaseException) -> None:
        self._storage_error = "disk_full" if is_disk_full(e) else "unavailable"
        if self._storage_error_since is None:
            self._storage_error_since = time.monotonic()

    def _storage_ok(self) -> None:
        if self._storage_error is not None:
            log.warning("storage reachable again after %.0f s",
                        time.monotonic() - (self._storage_error_since or time.monotonic()))
        self._storage_error = None
        self._storage_error_since = None

    def _storage(self, fn, what: str, within: float | None = None):
        """``fn()`` retried while storage errors are transient (at most
        ``storage_retry_seconds``)."""
        return retrying(fn, what=what, stop=self._stopping,
                        within=self.config.storage_retry_seconds if within is None else within,
                        on_failure=self._storage_failed, on_success=self._storage_ok)

    # -- loops

    def _dispatch_loop(self) -> None:
        while not self._stopping.is_set():
            try:
                claim = self._storage(
                    lambda: self.store.claim_next(
                        self.identity, max_running_per_tenant=self.config.running_per_tenant),
                    "looking for queued analyses", within=POLL_SECONDS)
            except Exception as e:  # storage down (retried) or a bug: look again shortly
                if not is_transient(e):
                    log.error("could not look for queued analyses: %s", safe_trace(e))
                claim = None
            if claim is None:
                with self._wake:
                    self._wake.wait(POLL_SECONDS)
                continue
            try:
                self._run(claim)
            except Exception as e:  # a bug in the runner must not end the thread
                log.error("analysis %s: the job runner failed: %s", claim.analysis_id,
                          safe_trace(e))
                self._give_back(claim, "the job runner failed")

    def _maintenance_loop(self) -> None:
        beat = min(5.0, self.config.lease_seconds / 3)
        sweep_every = max(beat, self.config.lease_seconds / 2)
        last_sweep = time.monotonic()
        while not self._stopping.wait(beat):
            try:
                self.ensure_threads()
                with self._active_lock:
                    claims = list(self._active.values())
                self.store.heartbeat(claims)
                self._storage_ok()
                if time.monotonic() - last_sweep >= sweep_every:
                    last_sweep = time.monotonic()
                    self._recover()
            except Exception as e:
                if is_transient(e):
                    self._storage_failed(e)
                log.warning("heartbeat or recovery failed: %s", safe_trace(e))

    def _recover(self) -> None:
        out = self.store.recover(lease_seconds=self.config.lease_seconds,
                                 max_attempts=self.config.max_attempts,
                                 runner_is_dead=runner_is_dead)
        if out["requeued"] or out["failed"]:
            log.warning("recovered analyses left running by a stopped runner: re-queued %s; "
                        "failed after %d attempts %s", out["requeued"] or "none",
                        self.config.max_attempts, out["failed"] or "none")
            self.notify()

    # -- one job

    def _run(self, claim: Claim) -> None:
        aid = claim.analysis_id
        with self._active_lock:  # heartbeats from the claim on, until the result is saved
            self._active[aid] = claim
        try:
            self._run_claimed(claim)
        finally:
            with self._active_lock:
                self._active.pop(aid, None)

    def _run_claimed(self, claim: Claim) -> None:
        aid = claim.analysis_id
        inputs = self._storage(lambda: self.store.job_inputs(aid), f"reading analysis {aid}")
        if inputs is None:  # deleted between claim and now
            return
        path = Path(self.config.data_dir) / inputs["stored_path"]
        if not path.is_file():
            log.error("analysis %s: stored file of its dataset is missing", aid)
            self._save(claim, error={
                "code": "dataset_unavailable",
                "message": "the dataset's stored file is missing from the service's data folder; "
                           "upload the file again and start a new analysis", "field": None})
            return
        sources = {}
        for name, src in (inputs.get("sources") or {}).items():
            src_path = Path(self.config.data_dir) / src["stored_path"] if src else None
            if src_path is None or not src_path.is_file():
                log.error("analysis %s: the dataset of its source %r is missing", aid, name)
                self._save(claim, error={
                    "code": "dataset_unavailable",
                    "message": f"the dataset of source '{name}' is no longer stored; upload it again and "
                               "start a new analysis", "field": f"sources.{name}"})
                return
            sources[name] = (str(src_path.resolve()), src["name"])
        spec = JobSpec(analysis_id=aid, attempt=claim.attempt, runner=claim.runner,
                       name=inputs["name"], design=inputs["design"], options=inputs["options"],
                       path=str(path.resolve()), sources=sources)
        t0 = time.monotonic()
        log.info("analysis %s started (attempt %d)", aid, claim.attempt)
        try:
            outcome: Outcome = self.backend.submit(spec).result()
        except WorkerLost as e:
            if not self._stopping.is_set():
                log.error("analysis %s lost its worker: %s", aid, e)
                self._lost(claim)
            return
        except Exception as e:
            if self._stopping.is_set():
                return
            log.error("analysis %s: the job runner failed: %s", aid, safe_trace(e))
            self._save(claim, error={
                "code": "internal_error",
                "message": f"internal error while running the analysis (analysis {aid}); the "
                           "service's log has the details", "field": None})
            return
        if outcome.cancelled:
            log.info("analysis %s stopped: it no longer belongs to this run", aid)
            return
        saved = self._save(claim, report=outcome.report, error=outcome.error)
        log.info("analysis %s %s in %.1f s%s", aid, "failed" if outcome.error else "succeeded",
                 time.monotonic() - t0, "" if saved else " (not saved)")

    def _save(self, claim: Claim, *, report: str | None = None, error: dict | None = None) -> bool:
        """Store the outcome, retrying while storage is down; past the retry window the
        analysis goes back to the queue (the attempt counts) rather than being lost."""
        try:
            return self._storage(lambda: self.store.finish(claim, report=report, error=error),
                                 f"saving the result of analysis {claim.analysis_id}")
        except Exception as e:
            if self._stopping.is_set():
                return False
            log.error("analysis %s: its result could not be saved: %s", claim.analysis_id,
                      "disk full" if is_disk_full(e) else safe_trace(e))
            self._give_back(claim, "its result could not be saved")
            return False

    def _give_back(self, claim: Claim, why: str) -> None:
        """Back to the queue with the attempt counted, or failed after max_attempts. When
        even that cannot be written, the claim is dropped: without heartbeats the recovery
        sweep re-queues it once storage answers again."""
        try:
            if claim.attempt >= self.config.max_attempts:
                self._storage(lambda: self.store.finish(claim, error={
                    "code": "not_saved",
                    "message": (f"the analysis ran {claim.attempt} times but {why} each time; "
                                "it is not tried again. Start it again later"), "field": None}),
                    "failing an analysis", within=10.0)
            else:
                self._storage(lambda: self.store.release_for_retry(claim),
                              "re-queueing an analysis", within=10.0)
                log.warning("analysis %s re-queued (attempt %d of %d): %s", claim.analysis_id,
                            claim.attempt, self.config.max_attempts, why)
        except Exception as e:
            log.error("analysis %s: left for the recovery sweep (%s)", claim.analysis_id,
                      safe_trace(e))
        self.notify()

    def _lost(self, claim: Claim) -> None:
        """The worker died under this job: queue it again, or fail it after max_attempts."""
        if claim.attempt >= self.config.max_attempts:
            self._save(claim, error={
                "code": "worker_lost",
                "message": (f"the process running this analysis stopped {claim.attempt} times "
                            "(killed or out of memory); it is not tried again. Try fewer "
                            "bootstrap replicates or a smaller file"), "field": None})
        else:
            try:
                self._storage(lambda: self.store.release_for_retry(claim), "re-queueing an analysis")
            except Exception as e:
                log.error("analysis %s: left for the recovery sweep (%s)", claim.analysis_id,
                          safe_trace(e))
        self.notify()


def make_backend(config: ServiceConfig, store: Store) -> Backend:
    if config.dask_address:
        from .dask_backend import DaskBackend

        return DaskBackend(config.dask_address, store)
    return LocalBackend(config.workers, config.sqlalchemy_url, config.process_cap)
