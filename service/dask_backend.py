"""Analyses on a Dask distributed cluster (SAMESOURCE_EXECUTOR=dask://HOST:PORT).

The job runs as one task on the cluster. Its bootstrap replicates fan out across the
cluster's workers through :class:`DaskExecutor`, samesource.executor's Executor protocol
over Dask. The task gets the file's bytes (cluster workers need not share the service's
disk or database) and sends its progress back as cluster events on one topic, which the
service writes to the database. When the analysis is deleted or re-queued (the service asks
every 0.5 s for each run it has on the cluster), the service sets the run's cluster event;
the job task asks it at each progress call and while it waits for a batch, and each batch
task between replicates (:class:`StopsWhenFlagged`), so the whole run stops within about a
second, its batches included. The workers need samesource installed (same version).
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import Future
from dataclasses import replace
from pathlib import Path
from typing import Any

from .errors import safe_trace
from .jobs import JobSpec, Outcome
from .store import Claim, Store

log = logging.getLogger("samesource.dask")

PROGRESS_TOPIC = "samesource-progress"
# A run's stop flag outlives the run by this long, so that its batch tasks, which ask the flag
# between replicates (at most every 0.5 s; one replicate of a large model can take seconds),
# see it after the job task itself has ended. A kept flag is a few bytes on the scheduler.
FLAG_KEEP_SECONDS = 60.0


def stop_event_name(analysis_id: str, attempt: int) -> str:
    """The cluster-wide flag that tells one run of an analysis to stop (deleted or re-queued)."""
    return f"samesource-stop-{analysis_id}-{attempt}"


class DaskExecutor:
    """samesource.executor's Executor over a Dask cluster: ``map(fn, items)`` runs each call
    as a task and returns the results in order.

    With a ``client`` it submits through that client; without one it must be used inside a
    task on the cluster, where it borrows a client with ``worker_client`` (the calling task
    leaves the worker's thread pool while it waits, so the fan-out cannot deadlock the worker
    it runs on). An exception raised by ``fn`` is re-raised; a task whose workers kept dying
    raises RuntimeError, as the protocol says.
    """

    def __init__(self, client: Any = None, *, stop_flag: str | None = None) -> None:
        self._client = client
        self._stop_flag = stop_flag  # the run's cluster event (stop_event_name), asked by each task

    @property
    def workers(self) -> int:
        if self._client is not None:
            return _threads(self._client)
        from distributed import get_client

        return _threads(get_client())

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]:
        items = list(items)
        if not items:
            return []
        if self._stop_flag is not None:
            fn = StopsWhenFlagged(fn, self._stop_flag)
        if self._client is not None:
            return _gather(self._client, fn, items)
        from distributed import worker_client

        with worker_client() as client:
            return _gather(client, fn, items)

    def __repr__(self) -> str:
        return "DaskExecutor()" if self._client is None else f"DaskExecutor({self._client!r})"


class StopsWhenFlagged:
    """``fn`` as a cluster task that stops when its run's stop flag (a cluster event) is set:
    the flag is asked between the task's steps (the bootstrap asks between replicates,
    samesource.executor.stop_when), at most every STOP_POLL_SECONDS. A running Dask task
    cannot be stopped from outside, so without this a deleted analysis's batches would keep
    the cluster's threads until their end. A stopped task answers None (nobody gathers it)."""

    def __init__(self, fn: Callable[[Any], Any], flag: str) -> None:
        self.fn = fn
        self.flag = flag
        self.__name__ = getattr(fn, "__name__", "task")  # the tasks' keys name the work

    def __call__(self, item: Any) -> Any:
        from distributed import Event

        from samesource.executor import StopRequested, stop_when

        flag = Event(self.flag)
        try:
            with stop_when(flag.is_set):
                return self.fn(item)
        except StopRequested:
            return None


def _threads(client: Any) -> int:
    return max(1, sum(client.nthreads().values()))


def _gather(client: Any, fn: Callable[[Any], Any], items: list[Any]) -> list[Any]:
    from distributed import KilledWorker

    from samesource.executor import StopRequested, stop_requested

    futures = client.map(fn, items, pure=False)
    try:
        # the stop flag is asked while a batch runs (stop_requested asks it every 0.5 s at most)
        while not all(f.done() for f in futures):
            time.sleep(0.1)
            if stop_requested():
                raise StopRequested("the work was told to stop")
        return client.gather(futures)
    except KilledWorker as e:
        raise RuntimeError(f"a Dask worker died running these tasks repeatedly ({e})") from e
    finally:
        client.cancel(futures)  # no-op for finished ones; stops the rest after an error


def _run_on_cluster(spec: JobSpec) -> Outcome:
    """The job as a Dask task."""
    from distributed import Event, get_worker

    from .jobs import Cancelled, run_job

    worker = get_worker()
    stop = Event(stop_event_name(spec.analysis_id, spec.attempt))

    def progress(stage: str, done: int, total: int) -> None:
        worker.log_event(PROGRESS_TOPIC, {"analysis_id": spec.analysis_id, "attempt": spec.attempt,
                                          "runner": spec.runner, "stage": stage, "done": done,
                                          "total": total})
        # Cancelling a Dask future does not stop a task that is running: the task asks.
        if stop.is_set():
            raise Cancelled(spec.analysis_id)

    from samesource.executor import stop_when

    with stop_when(stop.is_set):
        return run_job(spec, progress, executor=DaskExecutor(
            stop_flag=stop_event_name(spec.analysis_id, spec.attempt)))


class DaskBackend:
    """Submits jobs to the cluster and writes their progress events to the database."""

    name = "dask"

    def __init__(self, address: str, store: Store, *, timeout: float = 30) -> None:
        from distributed import Client

        self.address = address
        self._store = store
        self._client = Client(address, timeout=timeout, set_as_default=False)
        self._events: queue.Queue = queue.Queue()
        self._futures: dict[str, Any] = {}
        self._claims: dict[str, Claim] = {}
        self._stopped: set[tuple[str, int]] = set()
        self._lock = threading.Lock()
        self._closed = threading.Event()
        self._writer = threading.Thread(target=self._write_progress, daemon=True,
                                        name="samesource-dask-progress")
        self._writer.start()
        self._client.subscribe_topic(PROGRESS_TOPIC, self._on_event)

    def _on_event(self, event: tuple) -> None:
        # In the client's event loop: hand over, never block it with a database write.
        self._events.put(event[1])

    def _stop_deleted(self) -> None:
        """Set the stop flag of every job on the cluster whose analysis is no longer its run's
        (deleted, re-queued), without waiting for its next progress event."""
        with self._lock:
            claims = list(self._claims.values())
        for c in claims:
            try:
                if not self._store.owns(c):
                    self._stop(c.analysis_id, c.attempt)
            except Exception:  # storage down: ask again at the next round
                continue

    def _write_progress(self) -> None:
        while not self._closed.is_set():
            self._stop_deleted()
            try:
                msg = self._events.get(timeout=0.5)
            except queue.Empty:
                continue
            latest = {msg["analysis_id"]: msg}
            while True:  # only the newest event of each analysis is worth a write
                try:
                    m = self._events.get_nowait()
                except queue.Empty:
                    break
                latest[m["analysis_id"]] = m
            for m in latest.values():
                try:
                    ours = self._store.set_progress(Claim(m["analysis_id"], int(m["attempt"]),
                                                          m["runner"]), m["stage"], m["done"], m["total"])
                    if not ours:  # deleted, or re-queued to another run: stop it on the cluster
                        self._stop(m["analysis_id"], int(m["attempt"]))
                except Exception as e:
                    log.warning("progress of analysis %s not recorded: %s", m.get("analysis_id"),
                                safe_trace(e))

    def _stop(self, analysis_id: str, attempt: int) -> None:
        from distributed import Event

        with self._lock:
            if analysis_id not in self._futures:  # a late event of a job that has ended
                return
            if (analysis_id, attempt) in self._stopped:
                return
            self._stopped.add((analysis_id, attempt))
        log.info("analysis %s (attempt %d) no longer belongs to this run: stopping it on the "
                 "cluster", analysis_id, attempt)
        Event(stop_event_name(analysis_id, attempt), client=self._client).set()

    def _forget_stop(self, analysis_id: str, attempt: int) -> None:
        from distributed import Event

        if self._closed.is_set():
            return
        try:  # the scheduler keeps an event until it is cleared
            Event(stop_event_name(analysis_id, attempt), client=self._client).clear()
        except Exception as e:
            log.warning("clearing the stop flag of analysis %s: %s", analysis_id, safe_trace(e))

    def submit(self, spec: JobSpec) -> Future:
        from .runner import WorkerLost

        data = Path(spec.path).read_bytes() if spec.path else spec.data
        sources = {name: (Path(v).read_bytes() if isinstance(v, str) else v, label)
                   for name, (v, label) in spec.sources.items()}
        remote = replace(spec, path=None, data=data, sources=sources)
        dfut = self._client.submit(_run_on_cluster, remote, pure=False,
                                   key=f"samesource-analysis-{spec.analysis_id}-{spec.attempt}")
        with self._lock:
            self._futures[spec.analysis_id] = dfut
            self._claims[spec.analysis_id] = Claim(spec.analysis_id, spec.attempt, spec.runner)
        outer: Future = Future()

        def _wait() -> None:
            from distributed import KilledWorker

            try:
                outer.set_result(dfut.result())
            except KilledWorker as e:
                outer.set_exception(WorkerLost(f"the Dask workers running it died ({e})"))
            except (OSError, TimeoutError) as e:
                outer.set_exception(WorkerLost(f"lost the Dask cluster ({e.__class__.__name__})"))
            except BaseException as e:  # noqa: BLE001 - handed to the dispatcher
                outer.set_exception(e)
            finally:
                with self._lock:
                    self._futures.pop(spec.analysis_id, None)
                    self._claims.pop(spec.analysis_id, None)
                    stopped = (spec.analysis_id, spec.attempt) in self._stopped
                    self._stopped.discard((spec.analysis_id, spec.attempt))
                if stopped:  # its batch tasks may not have seen the flag yet
                    timer = threading.Timer(FLAG_KEEP_SECONDS, self._forget_stop,
                                            (spec.analysis_id, spec.attempt))
                    timer.daemon = True
                    timer.start()
                else:
                    self._forget_stop(spec.analysis_id, spec.attempt)

        threading.Thread(target=_wait, daemon=True, name=f"samesource-dask-{spec.analysis_id}").start()
        return outer

    def close(self) -> None:
        with self._lock:
            futures = list(self._futures.values())
        for f in futures:
            f.cancel()
        self._closed.set()
        try:
            self._client.close(timeout=10)
        except Exception as e:
            log.warning("closing the Dask client: %s", safe_trace(e))
