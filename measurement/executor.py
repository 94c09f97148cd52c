"""Where fan-out work runs: bootstrap replicates, jackknife fits and later other batches.

Everything that fans out goes through one small interface, :class:`Executor`: ``map(fn,
items)`` returns ``[fn(item) for item in items]`` in order, wherever the calls run. Two
implementations live here:

* :class:`SerialExecutor`: in the calling process, for small jobs and tests;
* :class:`LocalExecutor`: a pool of local worker processes, started with the "forkserver"
  method where the platform has it and "spawn" otherwise. Never "fork": the HTTP service runs
  threads, and forking a threaded process can copy a lock another thread holds into the
  child, which then deadlocks.

The service adds a Dask implementation of the same interface, and runs its job processes in a
:class:`LocalExecutor` too (``submit``, one process group per worker, ``own_groups=True``), so
there is one process-pool layer with one owner-death watchdog. :class:`WorkerBudget` is the one
cap on computing processes shared by several processes (the service's jobs): each running job
may use ``cap // running jobs`` workers, re-read as its tasks finish.

Contract for ``fn``: it must be picklable (a module-level function) and should handle its
own errors (the bootstrap wraps every replicate). An exception that escapes ``fn`` is
re-raised by ``map`` (the serial executor stops at once; the pool cancels the tasks not yet
started). A worker process that dies (killed, out of memory, crashed in C code) makes
``map`` raise :class:`WorkerLost` (a ``RuntimeError``). An interruption of ``map`` (KeyboardInterrupt,
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
import signal
import threading
import time
import weakref
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, InvalidStateError, ProcessPoolExecutor, wait
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
# A pool broken (a worker died) whose manager thread has not failed its futures by then has its
# futures failed by the pool's watcher (LocalExecutor._watch)
BROKEN_POOL_GRACE_SECONDS = 5.0


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


def _init_worker(blas_threads: int | None, owner_pid: int | None = None,
                 own_group: bool = False, initializer: Callable[..., None] | None = None,
                 initargs: tuple = ()) -> None:
    """Set a worker up: leave when the pool's owner dies (or this worker's parent, the
    forkserver, changes: it ends with the owner), and limit BLAS threads (one pool process per
    core, each multi-threaded, would oversubscribe the cores: the fitting engine measured 10x
    slower fits that way). With ``own_group`` the worker leads its own process group, and the
    watchdog ends the whole group (the worker and every process it started, a pool of its own
    included); then the caller's ``initializer(*initargs)`` runs."""
    if own_group:
        os.setpgid(0, 0)
    if owner_pid is not None:
        on_gone = (lambda: os.killpg(0, signal.SIGKILL)) if own_group else (lambda: os._exit(1))
        watch_owner(owner_pid, on_gone, parent_pid=os.getppid())
    if blas_threads is not None:
        for var in _BLAS_ENV:  # read by BLAS when numpy is first imported in this process
            os.environ[var] = str(blas_threads)
        try:  # libraries already loaded (by the main module or a preloaded one)
            from threadpoolctl import threadpool_limits
        except ImportError:  # pragma: no cover - threadpoolctl is a dependency
            pass
        else:
            threadpool_limits(limits=blas_threads)
    if initializer is not None:
        initializer(*initargs)


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


class WorkerLost(RuntimeError):
    """The process running a task died under it (killed, out of memory, crashed in C code);
    the service's Dask backend raises it too when the cluster is lost."""


class _Linked(Future):
    """The future :meth:`LocalExecutor.submit` returns: cancelling it cancels the pool's task
    too (when it has not started)."""

    def __init__(self) -> None:
        super().__init__()
        self.inner: Future | None = None

    def cancel(self) -> bool:
        # CPython 3.11 (gh-107219, fixed upstream after 3.11.7): if a worker dies while a
        # cancelled task still waits in the pool, the pool's manager thread raises
        # InvalidStateError on it and stops failing the pool's other futures. The pool's
        # watcher (LocalExecutor._watch) fails those itself; tests/test_executor_pool.py
        if self.inner is not None and not self.inner.cancel():
            return False
        return super().cancel()


class LocalExecutor:
    """A pool of local worker processes (``concurrent.futures.ProcessPoolExecutor``).

    The pool starts at the first :meth:`map` or :meth:`submit` and is reused by later calls,
    so start-up is paid once; :meth:`shutdown` (or leaving a ``with`` block) stops the
    workers, :meth:`terminate` kills them at once, and a later call starts a fresh pool. A
    pool whose worker died is dropped and the next call starts a fresh one. Safe to call from
    several threads at once.

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
    share:
        ``share()`` -> how many tasks of a :meth:`map` may run at once (at most
        ``max_workers``), asked as tasks finish (:meth:`WorkerBudget.share`); default all.
    own_groups:
        Each worker leads its own process group, and ending a worker (its owner died,
        :meth:`terminate`, a broken pool) ends its whole group: the service's job processes,
        which start pools of their own.
    initializer, initargs:
        Run in each worker after its set-up, as in ``ProcessPoolExecutor``.
    """

    def __init__(self, max_workers: int | None = None, *, start_method: str | None = None,
                 blas_threads: int | None = 1, import_main: bool = False,
                 share: Callable[[], int] | None = None, own_groups: bool = False,
                 initializer: Callable[..., None] | None = None, initargs: tuple = ()) -> None:
        n = (os.cpu_count() or 1) if max_workers is None else int(max_workers)
        if n < 1:
            raise ValueError(f"max_workers must be at least 1, got {max_workers}")
        context = pool_context(start_method, import_main)
        if blas_threads is not None and blas_threads < 1:
            raise ValueError(f"blas_threads must be at least 1 or None, got {blas_threads}")
        self._workers = n
        self._start_method = context.get_start_method()
        self._context = context
        self._share = share
        self._own_groups = own_groups
        self._initargs = (blas_threads, None, own_groups, initializer, tuple(initargs))
        self._pool: ProcessPoolExecutor | None = None
        # Re-entrant: a stop signal's exception can leave a "with lock" block between the
        # acquire and the block (the with statement is not atomic against signal handlers), and
        # the same thread then stops the pool, or exits, through the same lock.
        self._lock = threading.RLock()
        # the pids of every worker each pool started (own_groups: their groups are ended),
        # kept because a broken pool forgets them
        self._pids: dict[int, set[int]] = {}
        # each pool's futures not yet done, failed by the pool's watcher (_watch) if the pool
        # cannot fail them itself
        self._pending: dict[int, tuple[weakref.ref, set[Future]]] = {}

    @property
    def workers(self) -> int:
        """The number of worker processes."""
        return self._workers

    @property
    def start_method(self) -> str:
        """How workers start: "forkserver" or "spawn"."""
        return self._start_method

    def worker_pids(self) -> list[int]:
        """With ``own_groups``: the process ids of the workers started so far, each the leader
        of its own process group (empty otherwise)."""
        with self._lock:
            return sorted(p for pids in self._pids.values() for p in pids)

    def _get_pool(self) -> ProcessPoolExecutor:
        with self._lock:
            if self._pool is None:
                blas, _owner, own_group, init, args = self._initargs
                self._pool = ProcessPoolExecutor(
                    max_workers=self._workers, mp_context=self._context,
                    initializer=_init_worker,
                    initargs=(blas, os.getpid(), own_group, init, args))
            return self._pool

    def _submit(self, fn: Callable[[Any], Any], item: Any) -> tuple[ProcessPoolExecutor, Future]:
        pool = self._get_pool()
        try:
            fut = pool.submit(fn, item)
        except BrokenProcessPool:  # a worker died since the last call: start afresh
            self._end(pool)
            pool = self._get_pool()
            fut = pool.submit(fn, item)
        with self._lock:
            if self._own_groups:  # the pool starts its processes in submit
                self._pids.setdefault(id(pool), set()).update(list(getattr(pool, "_processes", None) or {}))
            ref, pending = self._pending.get(id(pool), (None, set()))
            if ref is None or ref() is not pool:  # (an id is reused once its pool is gone)
                ref, pending = self._pending[id(pool)] = (weakref.ref(pool), set())
                self._start_watch(pool, ref, pending)
            pending.add(fut)
        fut.add_done_callback(pending.discard)
        return pool, fut

    def _start_watch(self, pool: ProcessPoolExecutor, ref: weakref.ref,
                     pending: set[Future]) -> None:
        """Start the thread that fails ``pool``'s futures left pending when the pool breaks."""
        # The manager thread (started by the pool's first submit) is the one that completes the
        # pool's futures; private, so a Python without it goes unwatched.
        manager = getattr(pool, "_executor_manager_thread", None)
        if manager is None:  # pragma: no cover - every Python 3.11 to 3.13 has it
            return
        processes = getattr(pool, "_processes", None)  # the dict the manager fills
        threading.Thread(target=self._watch,
                         args=(id(pool), ref, manager, {} if processes is None else processes, pending),
                         daemon=True, name="samesource-pool-watch").start()

    def _watch(self, key: int, pool_ref: weakref.ref, manager: threading.Thread,
               processes: dict, pending: set[Future]) -> None:
        """Wait until the pool's manager thread ends, or the pool has been broken (a worker
        died) for BROKEN_POOL_GRACE_SECONDS; then fail every future of the pool still pending
        with BrokenProcessPool (its callbacks make that WorkerLost), and if the pool broke,
        drop it and kill its workers left alive.

        Once its manager thread has ended nobody else completes a pool's futures. It ends
        after failing them all when a worker dies, except in CPython 3.11's race (gh-107219):
        a cancelled task still waiting in the pool makes it raise InvalidStateError half-way,
        leaving later futures pending for ever (a caller waiting on one would hang) and the
        other workers running. The grace bounds the wait should the manager thread itself
        wedge while the pool is broken."""
        broken_since: float | None = None
        while manager.is_alive():
            manager.join(OWNER_POLL_SECONDS)
            pool = pool_ref()
            if pool is not None and getattr(pool, "_broken", False):
                broken_since = broken_since or time.monotonic()
                if time.monotonic() - broken_since >= BROKEN_POOL_GRACE_SECONDS:
                    break
            del pool
        pool = pool_ref()
        broken = pool is not None and bool(getattr(pool, "_broken", False))
        lost = BrokenProcessPool("the pool's manager thread ended with the task pending "
                                 "(a worker process died)")
        for fut in list(pending):
            with contextlib.suppress(InvalidStateError):  # done or cancelled meanwhile
                fut.set_exception(lost)
        if pool is not None and broken:
            self._end(pool)
        if broken:
            for proc in list(processes.values()):
                if proc.is_alive():
                    proc.kill()
        with self._lock:
            if self._pending.get(key, (None, None))[1] is pending:
                del self._pending[key]

    def submit(self, fn: Callable[[Any], Any], item: Any) -> Future:
        """Run ``fn(item)`` in a worker; the future's result is its value. A worker that dies
        under the task makes the future raise :class:`WorkerLost` (the pool is dropped, and
        with ``own_groups`` what is left of every worker's group ended); ``cancel()`` drops a
        task that has not started, :meth:`terminate` stops running ones."""
        # Every other future of a broken pool raises WorkerLost too, even in Python 3.11's race
        # with a cancelled task (the pool's watcher, _watch).
        pool, fut = self._submit(fn, item)
        outer = _Linked()
        outer.inner = fut

        def _done(f: Future) -> None:
            if f.cancelled():
                outer.cancel()
                return
            try:
                outer.set_result(f.result())
            except BrokenProcessPool as e:
                self._end(pool)
                outer.set_exception(WorkerLost(f"a worker process stopped ({e.__class__.__name__})"))
            except BaseException as e:  # noqa: BLE001 - handed to the caller
                outer.set_exception(e)

        fut.add_done_callback(_done)
        return outer

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]:
        """``[fn(item) for item in items]``, run in the workers, in the order of ``items``
        (at most ``share()`` at once when the pool has a share)."""
        items = list(items)
        if not items:
            return []
        pool = self._get_pool()
        futures: list[Future] = []
        running: set[Future] = set()
        try:
            if self._share is None and not _checks():
                # Nothing to ask while waiting: submit all and wait on each result in turn. A
                # signal's exception (the command line's stop) then arrives inside one
                # Future.result, which gives its lock back; concurrent.futures.wait takes the
                # locks of several futures at once and could leave one held, and the pool's
                # manager thread (and the interpreter's exit) would wait for it for ever.
                for item in items:
                    pool, fut = self._submit(fn, item)
                    futures.append(fut)
                return [f.result() for f in futures]
            while True:
                allowed = len(items) if self._share is None else max(1, min(self._workers, self._share()))
                while len(futures) < len(items) and len(running) < allowed:
                    pool, fut = self._submit(fn, items[len(futures)])
                    futures.append(fut)
                    running.add(fut)
                if not running:
                    break
                done, running = wait(running, return_when=FIRST_COMPLETED,
                                     timeout=STOP_POLL_SECONDS if _checks() else None)
                for f in done:
                    f.result()  # a task's error (or a dead worker) ends the map here
                if stop_requested():
                    self._terminate(pool)
                    raise StopRequested("the work was told to stop")
            return [f.result() for f in futures]
        except BrokenProcessPool as exc:
            self._end(pool)
            raise WorkerLost(
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

    def _drop(self, pool: ProcessPoolExecutor) -> tuple[bool, set[int]]:
        """Forget ``pool`` (the next call starts a fresh one): whether it was the current one,
        and the pids it started."""
        with self._lock:
            current = self._pool is pool
            if current:
                self._pool = None
            return current, self._pids.pop(id(pool), set())

    def _end(self, pool: ProcessPoolExecutor) -> None:
        """A worker died (or the pool is closed): drop the pool and, with ``own_groups``, end
        what is left of every worker's process group, the dead one's own processes included."""
        _current, pids = self._drop(pool)
        pool.shutdown(wait=False, cancel_futures=True)
        if self._own_groups:
            for pid in pids:
                with contextlib.suppress(ProcessLookupError, PermissionError):
                    os.killpg(pid, signal.SIGKILL)

    def _terminate(self, pool: ProcessPoolExecutor) -> None:
        """Cancel what has not started, kill the workers and drop the pool."""
        # ProcessPoolExecutor has no public way to stop running tasks before Python 3.14
        # (terminate_workers), so its private worker table is read, and missing is tolerated.
        procs = list((getattr(pool, "_processes", None) or {}).values())
        # The tasks no worker has read are not wanted: without this, the queue's feeder thread
        # can block on a full pipe that no live worker reads, and the pool's manager thread (and
        # with it the interpreter's exit) waits for it for ever.
        call_queue = getattr(pool, "_call_queue", None)
        if call_queue is not None:
            call_queue.cancel_join_thread()
        if self._own_groups:
            self._end(pool)
            return
        self._drop(pool)
        pool.shutdown(wait=False, cancel_futures=True)
        for proc in procs:
            if proc.is_alive():
                proc.terminate()
        for proc in procs:
            proc.join(timeout=5)
            if proc.is_alive():
                proc.kill()

    def terminate(self) -> None:
        """Stop now: cancel the tasks not started and kill the workers running the others
        (with ``own_groups``, their whole groups)."""
        with self._lock:
            pool = self._pool
        if pool is not None:
            self._terminate(pool)

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


# ------------------------------------------------------- one cap shared by several processes

class WorkerBudget:
    """One cap on the computing processes of several processes that each run work with a
    pool of their own (the service's job processes, each with its bootstrap's pool).

    Each running job holds a place (:meth:`enter` / :meth:`leave`, or :meth:`running`; the
    service takes it in its own process, which outlives a killed job) and may use
    :meth:`share` = ``cap // running jobs`` workers (at least one), asked again as its tasks
    finish: a lone job uses the whole cap, and once others start every one is down to its
    share by the end of its current task. Made in the service's process and handed to the job
    processes when they start (a shared counter in shared memory), so it is picklable only
    then, as multiprocessing's locks are."""

    def __init__(self, cap: int, context: Any = None) -> None:
        if cap < 1:
            raise ValueError(f"the cap on processes must be at least 1, got {cap}")
        self.cap = int(cap)
        self._running = (context or pool_context()).Value("i", 0)

    def share(self) -> int:
        """The workers one running job may use now."""
        with self._running.get_lock():
            n = self._running.value
        return max(1, self.cap // max(1, n))

    def enter(self) -> None:
        """Count one more running job (give the place back with :meth:`leave`)."""
        with self._running.get_lock():
            self._running.value += 1

    def leave(self) -> None:
        with self._running.get_lock():
            self._running.value -= 1

    @contextlib.contextmanager
    def running(self) -> Iterator[None]:
        """Count a job among the running ones while the block runs."""
        self.enter()
        try:
            yield
        finally:
            self.leave()

    def __repr__(self) -> str:
        return f"WorkerBudget(cap={self.cap})"


_SHARED: list[LocalExecutor] = []
_SHARED_LOCK = threading.Lock()
_LIMIT: list[int | WorkerBudget] = []  # limit_workers(...): the shared pool's cap in this process


def limit_workers(limit: int | WorkerBudget) -> None:
    """Cap the worker processes :func:`default_executor` uses in this process: a number (1:
    every batch runs serially, no pool), or a :class:`WorkerBudget` shared with other
    processes (the pool has up to ``cap`` workers, and each batch runs its share at once).
    The service calls it in each job process with the service's one budget."""
    if isinstance(limit, WorkerBudget):
        pass
    elif int(limit) != limit or limit < 1:
        raise ValueError(f"the worker limit must be at least 1, got {limit}")
    with _SHARED_LOCK:
        _LIMIT[:] = [limit]


def _pool_size() -> int:
    cores = os.cpu_count() or 1
    if not _LIMIT:
        return cores
    limit = _LIMIT[0]
    return min(limit.cap if isinstance(limit, WorkerBudget) else limit, cores)


def _shared_local_executor() -> LocalExecutor:
    # One pool per process, reused by every job that asks for the default, so the service
    # pays worker start-up once rather than per analysis. Workers start as tasks need them.
    with _SHARED_LOCK:
        if not _SHARED:
            limit = _LIMIT[0] if _LIMIT else None
            share = limit.share if isinstance(limit, WorkerBudget) else None
            _SHARED.append(LocalExecutor(_pool_size(), share=share))
            atexit.register(_SHARED[0].shutdown)
        return _SHARED[0]


def default_executor(n_tasks: int) -> Executor:
    """The executor for ``n_tasks`` tasks: serial for tiny jobs, a single core or a limit of
    one worker (:func:`limit_workers`), otherwise the process-wide shared
    :class:`LocalExecutor` (its caller need not shut it down)."""
    if n_tasks <= SERIAL_MAX_TASKS or _pool_size() < 2:
        return SerialExecutor()
    return _shared_local_executor()


__all__ = ["Executor", "LocalExecutor", "SerialExecutor", "WorkerBudget", "WorkerLost",
           "default_executor", "limit_workers", "SERIAL_MAX_TASKS", "StopRequested",
           "stop_requested", "stop_when"]
