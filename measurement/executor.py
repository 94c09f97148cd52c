"""Where fan-out work runs: bootstrap replicates, jackknife fits and later other batches.

Everything that fans out goes through one small interface, :class:`Executor`: ``map(fn,
items)`` returns ``[fn(item) for item in items]`` in order, wherever the calls run. Two
implementations live here:

* :class:`SerialExecutor`: in the calling process, for small jobs and tests;
* :class:`LocalExecutor`: a pool of local worker processes, started with the "forkserver"
  method where the platform has it and "spawn" otherwise. Never "fork": the HTTP service runs
  threads, and forking a threaded process can copy a lock another thread holds into the
  child, which then deadlocks.

The service adds a Dask implementation of the same interface.

Contract for ``fn``: it must be picklable (a module-level function) and should handle its
own errors (the bootstrap wraps every replicate). An exception that escapes ``fn`` is
re-raised by ``map`` (the serial executor stops at once; the pool cancels the tasks not yet
started). A worker process that dies (killed, out of memory, crashed in C code) makes
``map`` raise :class:`RuntimeError`. An interruption of ``map`` (KeyboardInterrupt,
SystemExit) kills the pool's workers at once, and every worker leaves by itself within about a
second when the process that owns the pool dies, even by SIGKILL.
"""

from __future__ import annotations

import atexit
import contextlib
import io
import math
import multiprocessing
import os
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import FIRST_EXCEPTION, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from multiprocessing import context as mp_context
from multiprocessing import forkserver, popen_forkserver, reduction, spawn
from multiprocessing import util as mp_util
from typing import Any, Protocol, runtime_checkable

# Up to this many tasks the default is serial. Start-up is each worker importing the main
# module and the task's modules: on the two-core development machine a pool of two took
# 0.2-0.3 s with a main module importing numpy, 1.1-1.3 s (up to 2.5 s on a busy machine)
# with one importing samesource.pipeline as the command line does. Python 3.11's forkserver
# does not preload the main module, so "spawn" cost the same.
SERIAL_MAX_TASKS = 16

_BLAS_ENV = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


@runtime_checkable
class Executor(Protocol):
    """Runs ``fn`` over ``items`` and returns the results in the order of ``items``."""

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]: ...

    @property
    def workers(self) -> int: ...


# ---------------------------------------------------------------------- stopping between batches

STOP_POLL_SECONDS = 0.5  # how often a waiting map asks whether to stop
_STOP = threading.local()  # .checks: the calling thread's checks (a Dask worker runs several runs' tasks)


class StopRequested(Exception):
    """The work was told to stop (its owner no longer wants the results)."""


def _checks() -> list[Callable[[], bool]]:
    checks = getattr(_STOP, "checks", None)
    if checks is None:
        checks = _STOP.checks = []
    return checks


@contextlib.contextmanager
def stop_when(check: Callable[[], bool]) -> Iterator[None]:
    """While the block runs in this thread, an executor waiting for a batch asks ``check()``
    every :data:`STOP_POLL_SECONDS`, and the bootstrap asks it between replicates; when it
    answers True the batch's workers are stopped and :class:`StopRequested` is raised. The
    service uses it so that deleting a dataset stops its bootstrap within a second, not at the
    end of a long batch. Per thread: a cluster worker runs tasks of several runs at once, each
    with its own check. ``check`` itself is asked at most every STOP_POLL_SECONDS (it may be
    a database query), and once it has said stop the answer stays."""
    last = -math.inf
    stop = False

    def throttled() -> bool:
        nonlocal last, stop
        if not stop and time.monotonic() - last >= STOP_POLL_SECONDS:
            last = time.monotonic()
            stop = bool(check())
        return stop

    checks = _checks()
    checks.append(throttled)
    try:
        yield
    finally:
        checks.remove(throttled)


def stop_requested() -> bool:
    """True when a check registered with :func:`stop_when` in this thread asks to stop."""
    return any(check() for check in list(_checks()))


class SerialExecutor:
    """Runs every task in the calling process, one after another (no pickling)."""

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]:
        """``[fn(item) for item in items]``."""
        return [fn(item) for item in items]

    @property
    def workers(self) -> int:
        """One: the calling process."""
        return 1

    def __repr__(self) -> str:
        return "SerialExecutor()"


OWNER_POLL_SECONDS = 1.0


def process_alive(pid: int) -> bool:
    """Whether a process with this id exists (one owned by another user counts as alive)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


def watch_owner(owner_pid: int, on_gone: Callable[[], None], *, parent_pid: int | None = None,
                name: str = "samesource-owner-watch") -> None:
    """In a worker process: a daemon thread that calls ``on_gone()`` once the owner process is
    gone (or, with ``parent_pid``, once this process's parent is no longer that one), asked
    every OWNER_POLL_SECONDS. The one watchdog of every pool we start: the bootstrap's (the
    worker leaves) and the service's job processes (the job's whole process group ends).

    A pool worker blocks on a task queue whose write end every worker also holds, so it never
    sees end-of-file when the process that owns the pool is killed: it would sit idle (or
    finish a long task) for ever. Polling the owner is the one signal that always arrives."""
    def watch() -> None:
        while process_alive(owner_pid) and (parent_pid is None or os.getppid() == parent_pid):
            time.sleep(OWNER_POLL_SECONDS)
        on_gone()

    threading.Thread(target=watch, daemon=True, name=name).start()


def _init_worker(blas_threads: int | None, owner_pid: int | None = None) -> None:
    """Set a worker up: leave when the pool's owner dies, and limit BLAS threads (one pool
    process per core, each multi-threaded, would oversubscribe the cores: the fitting engine
    measured 10x slower fits that way)."""
    if owner_pid is not None:
        watch_owner(owner_pid, lambda: os._exit(1))
    if blas_threads is None:
        return
    for var in _BLAS_ENV:  # read by BLAS when numpy is first imported in this process
        os.environ[var] = str(blas_threads)
    try:  # libraries already loaded (by the main module or a preloaded one)
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl is a dependency
        return
    threadpool_limits(limits=blas_threads)


# ------------------------------------------------ workers that do not run the caller's script

class _PopenWithoutMain(popen_forkserver.Popen):
    """Starts a forkserver worker without the caller's main module.

    The standard start sends the path of the script that runs (``__main__``) to every new
    worker, which imports it again before its first task: a script or notebook cell that calls
    :func:`samesource.analyze` at top level, without an ``if __name__ == "__main__":`` guard,
    would start the analysis again in each worker, and the worker dies. A worker here runs
    only module-level functions of samesource (the contract of :meth:`LocalExecutor.map`), so
    it needs nothing from ``__main__``. This is the standard ``_launch`` (the same in Python
    3.11 to 3.13) with the main module's entries left out of the preparation data."""

    def _launch(self, process_obj: Any) -> None:
        prep_data = {k: v for k, v in spawn.get_preparation_data(process_obj._name).items()
                     if k not in _MAIN_KEYS}
        buf = io.BytesIO()
        mp_context.set_spawning_popen(self)
        try:
            reduction.dump(prep_data, buf)
            reduction.dump(process_obj, buf)
        finally:
            mp_context.set_spawning_popen(None)
        self.sentinel, w = forkserver.connect_to_new_process(self._fds)
        parent_w = os.dup(w)  # the child watches this end to see its parent go
        self.finalizer = mp_util.Finalize(self, mp_util.close_fds, (parent_w, self.sentinel))
        with open(w, "wb", closefd=True) as f:
            f.write(buf.getbuffer())
        self.pid = forkserver.read_signed(self.sentinel)


_MAIN_KEYS = ("init_main_from_name", "init_main_from_path")


class _ProcessWithoutMain(mp_context.ForkServerProcess):
    _start_method = "forkserver"

    @staticmethod
    def _Popen(process_obj: Any) -> _PopenWithoutMain:
        return _PopenWithoutMain(process_obj)


class _ForkServerWithoutMain(mp_context.ForkServerContext):
    Process = _ProcessWithoutMain


def pool_context(start_method: str | None = None, import_main: bool = False) -> Any:
    """The multiprocessing context of every pool we start (the bootstrap's and the service's
    job processes): "forkserver" where the platform has it, else "spawn"; never "fork" (a
    threaded process, as the service is, can hand a held lock to a forked child)."""
    available = multiprocessing.get_all_start_methods()
    if start_method is None:
        start_method = "forkserver" if "forkserver" in available else "spawn"
    if start_method == "fork":
        raise ValueError("the 'fork' start method is unsafe in a threaded process; "
                         "use 'forkserver' or 'spawn'")
    if start_method not in available:
        raise ValueError(f"start method {start_method!r} is not available here "
                         f"(available: {', '.join(available)})")
    return _context(start_method, import_main)


def _context(start_method: str, import_main: bool) -> Any:
    """The multiprocessing context of a pool. Forkserver workers start without the caller's
    main module unless ``import_main``, so scripts and notebooks need no ``__main__`` guard;
    "spawn" (the only method on Windows) imports it, as Python's documentation describes, and
    needs one."""
    if start_method == "forkserver" and not import_main:
        return _ForkServerWithoutMain()
    return multiprocessing.get_context(start_method)


class LocalExecutor:
    """A pool of local worker processes (``concurrent.futures.ProcessPoolExecutor``).

    The pool starts at the first :meth:`map` and is reused by later calls, so start-up is
    paid once; :meth:`shutdown` (or leaving a ``with`` block) stops the workers, and a later
    ``map`` would start a fresh pool. Safe to call from several threads at once.

    Parameters
    ----------
    max_workers:
        Number of worker processes; default ``os.cpu_count()``.
    start_method:
        "forkserver" (default where available) or "spawn". "fork" is refused (see module).
    blas_threads:
        BLAS/OpenMP threads per worker (default 1); ``None`` leaves them alone.
    import_main:
        Whether each forkserver worker imports the caller's main module before its first task
        (default False: a script or notebook that runs the analysis at top level needs no
        ``if __name__ == "__main__":`` guard). True is needed only when ``fn`` is defined in the
        main script itself, which must then have the guard; "spawn" always imports it.
    """

    def __init__(self, max_workers: int | None = None, *, start_method: str | None = None,
                 blas_threads: int | None = 1, import_main: bool = False) -> None:
        n = (os.cpu_count() or 1) if max_workers is None else int(max_workers)
        if n < 1:
            raise ValueError(f"max_workers must be at least 1, got {max_workers}")
        context = pool_context(start_method, import_main)
        if blas_threads is not None and blas_threads < 1:
            raise ValueError(f"blas_threads must be at least 1 or None, got {blas_threads}")
        self._workers = n
        self._start_method = context.get_start_method()
        self._blas_threads = blas_threads
        self._context = context
        self._pool: ProcessPoolExecutor | None = None
        self._lock = threading.Lock()

    @property
    def workers(self) -> int:
        """The number of worker processes."""
        return self._workers

    @property
    def start_method(self) -> str:
        """How workers start: "forkserver" or "spawn"."""
        return self._start_method

    def _get_pool(self) -> ProcessPoolExecutor:
        with self._lock:
            if self._pool is None:
                self._pool = ProcessPoolExecutor(
                    max_workers=self._workers, mp_context=self._context,
                    initializer=_init_worker, initargs=(self._blas_threads, os.getpid()))
            return self._pool

    def _discard(self, pool: ProcessPoolExecutor) -> None:
        """Drop a broken pool so that the next ``map`` starts a fresh one."""
        with self._lock:
            if self._pool is pool:
                self._pool = None
        pool.shutdown(wait=False, cancel_futures=True)

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]:
        """``[fn(item) for item in items]``, run in the workers, in the order of ``items``."""
        items = list(items)
        if not items:
            return []
        pool = self._get_pool()
        futures = []
        try:
            futures = [pool.submit(fn, item) for item in items]
            while _checks():
                done, pending = wait(futures, timeout=STOP_POLL_SECONDS,
                                     return_when=FIRST_EXCEPTION)
                if not pending or any(f.exception() is not None for f in done):
                    break
                if stop_requested():
                    self._terminate(pool)
                    raise StopRequested("the work was told to stop")
            return [f.result() for f in futures]
        except BrokenProcessPool as exc:
            self._discard(pool)
            raise RuntimeError(
                "a worker process of the local pool died (killed, out of memory or crashed); "
                f"{len(items)} tasks were lost") from exc
        except Exception:
            for f in futures:
                f.cancel()
            raise
        except BaseException:
            # Interrupted or told to stop (KeyboardInterrupt, SystemExit, the command line's
            # stop signal): the running tasks' results are no longer wanted, so stop the
            # workers now instead of waiting for them.
            self._terminate(pool)
            raise

    def _terminate(self, pool: ProcessPoolExecutor) -> None:
        """Cancel what has not started, kill the workers and drop the pool."""
        with self._lock:
            if self._pool is pool:
                self._pool = None
        # ProcessPoolExecutor has no public way to stop running tasks before Python 3.14
        # (terminate_workers), so its private worker table is read, and missing is tolerated.
        procs = list((getattr(pool, "_processes", None) or {}).values())
        pool.shutdown(wait=False, cancel_futures=True)
        for proc in procs:
            if proc.is_alive():
                proc.terminate()
        for proc in procs:
            proc.join(timeout=5)
            if proc.is_alive():
                proc.kill()

    def shutdown(self, wait: bool = True) -> None:
        """Stop the worker processes (tasks not yet started are cancelled)."""
        with self._lock:
            pool, self._pool = self._pool, None
        if pool is not None:
            pool.shutdown(wait=wait, cancel_futures=True)

    def __enter__(self) -> LocalExecutor:
        return self

    def __exit__(self, *exc: object) -> None:
        self.shutdown()

    def __repr__(self) -> str:
        return f"LocalExecutor(max_workers={self._workers}, start_method={self._start_method!r})"


_SHARED: list[LocalExecutor] = []
_SHARED_LOCK = threading.Lock()
_LIMIT: list[int] = []  # limit_workers(n): the shared pool's size in this process


def limit_workers(n: int) -> None:
    """Cap the worker processes :func:`default_executor` starts in this process at ``n``
    (1: every batch runs serially, no pool). The service calls it in each job process, with
    its one cap on processes shared out among the jobs that run at once."""
    if n < 1:
        raise ValueError(f"the worker limit must be at least 1, got {n}")
    with _SHARED_LOCK:
        _LIMIT[:] = [int(n)]


def _pool_size() -> int:
    return min(_LIMIT[0], os.cpu_count() or 1) if _LIMIT else (os.cpu_count() or 1)


def _shared_local_executor() -> LocalExecutor:
    # One pool per process, reused by every job that asks for the default, so the service
    # pays worker start-up once rather than per analysis.
    with _SHARED_LOCK:
        if not _SHARED:
            _SHARED.append(LocalExecutor(_pool_size()))
            atexit.register(_SHARED[0].shutdown)
        return _SHARED[0]


def default_executor(n_tasks: int) -> Executor:
    """The executor for ``n_tasks`` tasks: serial for tiny jobs, a single core or a limit of
    one worker (:func:`limit_workers`), otherwise the process-wide shared
    :class:`LocalExecutor` (its caller need not shut it down)."""
    if n_tasks <= SERIAL_MAX_TASKS or _pool_size() < 2:
        return SerialExecutor()
    return _shared_local_executor()


__all__ = ["Executor", "LocalExecutor", "SerialExecutor", "default_executor", "limit_workers", "SERIAL_MAX_TASKS",
           "StopRequested", "stop_requested", "stop_when"]
