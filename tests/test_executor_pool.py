"""LocalExecutor when a worker dies: every future ends, even in CPython 3.11's pool race.

gh-107219 (CPython; the fix is not in 3.11.7, the Python installed here): when a worker of a
ProcessPoolExecutor dies while a cancelled task still waits in the pool, the pool's manager
thread raises InvalidStateError on that task and stops failing the pool's futures after it,
and leaves the other workers running. samesource.executor's pool watcher fails them itself.
"""

from __future__ import annotations

import os
import signal
import threading
import time
from pathlib import Path

import pytest

from samesource.executor import LocalExecutor, WorkerLost


def _note_pid_and_sleep(args: tuple[str, float]) -> None:
    folder, seconds = args
    Path(folder, str(os.getpid())).touch()
    time.sleep(seconds)


def _map_into(ex: LocalExecutor, errors: list[BaseException]) -> None:
    try:
        ex.map(abs, [-20, -21])
    except BaseException as e:  # noqa: BLE001 - looked at by the test
        errors.append(e)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    # a killed child not yet reaped by the pool still answers; its state says it is gone
    try:
        return Path(f"/proc/{pid}/stat").read_text().split(")")[-1].split()[0] != "Z"
    except OSError:
        return False


def _wait_for(check, seconds: float) -> bool:
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        if check():
            return True
        time.sleep(0.05)
    return check()


# the manager thread's InvalidStateError of the race (Python 3.11), printed by threading's hook
@pytest.mark.filterwarnings("ignore::pytest.PytestUnhandledThreadExceptionWarning")
@pytest.mark.parametrize("own_groups", [False, True])
def test_a_cancelled_task_waiting_when_a_worker_dies_leaves_no_future_pending(tmp_path, own_groups):
    workers = 2
    ex = LocalExecutor(workers, own_groups=own_groups)
    try:
        busy = [ex.submit(_note_pid_and_sleep, (str(tmp_path), 60)) for _ in range(workers)]
        assert _wait_for(lambda: len(list(tmp_path.iterdir())) == workers, 30)
        pids = sorted(int(p.name) for p in tmp_path.iterdir())
        # Both workers are busy: the pool's call queue takes max_workers + 1 tasks that no
        # worker reads, so the next one certainly still waits in the pool when cancelled,
        # and the submit after it cannot move it out (the queue is full).
        in_queue = [ex.submit(abs, -i) for i in range(workers + 1)]
        cancelled = ex.submit(abs, -10)
        assert cancelled.cancel()
        after = ex.submit(abs, -11)
        mapped: list[BaseException] = []  # a map waiting in another thread (a bootstrap)
        mapping = threading.Thread(target=_map_into, args=(ex, mapped), daemon=True)
        mapping.start()
        time.sleep(0.3)  # let the manager thread see the last submits
        os.kill(pids[0], signal.SIGKILL)
        for fut in [*busy, *in_queue, after]:
            with pytest.raises(WorkerLost):
                fut.result(timeout=8)
        mapping.join(timeout=8)
        assert [type(e) for e in mapped] == [WorkerLost]
        assert cancelled.cancelled()
        # the other worker does not run on for its 60 s, and the next task has a fresh pool
        assert _wait_for(lambda: not _alive(pids[1]), 5), "the other worker was left running"
        assert ex.submit(abs, -5).result(timeout=30) == 5
    finally:
        ex.terminate()


def test_a_worker_killed_with_nothing_cancelled_still_fails_every_future(tmp_path):
    # the ordinary path (the pool fails its futures itself) is unchanged by the watcher
    with LocalExecutor(1) as ex:
        busy = ex.submit(_note_pid_and_sleep, (str(tmp_path), 60))
        waiting = [ex.submit(abs, -i) for i in range(4)]
        assert _wait_for(lambda: any(tmp_path.iterdir()), 30)
        os.kill(int(next(tmp_path.iterdir()).name), signal.SIGKILL)
        for fut in [busy, *waiting]:
            with pytest.raises(WorkerLost):
                fut.result(timeout=8)
        assert ex.map(abs, [-1, -2]) == [1, 2]
