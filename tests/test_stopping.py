"""Stopping a run leaves no worker processes behind.

A command-line analysis with a bootstrap fans replicates out to a local process pool. Told to
stop (SIGTERM, as a scheduler or `kill` sends) it must end with its own exit code, write no
half report and take its workers with it; killed outright (SIGKILL, out of memory) its
workers must still leave by themselves. Linux only: processes are found through /proc.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_surveys" / "staff_survey.csv"
DESIGN = ROOT / "sample_surveys" / "staff_survey_design.json"

pytestmark = pytest.mark.skipif(not Path("/proc/self/stat").exists() or (os.cpu_count() or 1) < 2,
                                reason="needs Linux /proc and at least two cores (a process pool)")


def group_members(pgid: int) -> set[int]:
    """Live (not zombie) processes whose process group is ``pgid``."""
    out = set()
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
        except OSError:
            continue
        fields = stat[stat.rindex(")") + 2:].split()  # after "pid (comm) "
        state, pgrp = fields[0], int(fields[2])
        if pgrp == pgid and state != "Z":
            out.add(int(entry.name))
    return out


def wait_for(pred, timeout: float, what: str) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if pred():
            return
        time.sleep(0.2)
    raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}")


def kill_group(pgid: int) -> None:
    try:
        os.killpg(pgid, signal.SIGKILL)
    except ProcessLookupError:
        pass


def test_sigterm_stops_the_command_line_and_its_workers(tmp_path):
    out = tmp_path / "report"
    proc = subprocess.Popen(
        [sys.executable, "-m", "samesource.service.cli", "analyze", str(SAMPLE), "--design", str(DESIGN),
         "--bootstrap", "5000", "--out", str(out)],
        cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        # main process, resource tracker, forkserver and the two workers: the bootstrap runs
        wait_for(lambda: len(group_members(proc.pid)) >= 5, 240, "the bootstrap's worker processes")
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=60)
        assert proc.returncode == 128 + signal.SIGTERM, err
        assert "stopped by SIGTERM" in err and "nothing was written" in err
        assert not (out / "report.json").exists()
        wait_for(lambda: not group_members(proc.pid), 15, "the worker processes to end")
    finally:
        kill_group(proc.pid)


def test_workers_leave_when_the_owner_is_killed(tmp_path):
    script = tmp_path / "owner.py"
    script.write_text(textwrap.dedent("""
        import time
        from samesource.executor import LocalExecutor

        if __name__ == "__main__":  # workers import this file again
            LocalExecutor(2).map(time.sleep, [120] * 4)
    """), encoding="utf-8")
    proc = subprocess.Popen([sys.executable, str(script)], cwd=ROOT, start_new_session=True)
    try:
        wait_for(lambda: len(group_members(proc.pid)) >= 5, 60, "the pool's worker processes")
        workers = group_members(proc.pid) - {proc.pid}
        proc.kill()  # SIGKILL: no handler, no atexit
        proc.wait(timeout=10)
        # each worker polls its owner once a second (samesource.executor.OWNER_POLL_SECONDS)
        wait_for(lambda: not (group_members(proc.pid) & workers), 15, "the orphaned workers to leave")
    finally:
        kill_group(proc.pid)


def test_an_interrupted_map_kills_running_tasks_at_once(tmp_path):
    script = tmp_path / "interrupted.py"
    script.write_text(textwrap.dedent("""
        import sys
        import time
        from samesource.executor import LocalExecutor
        from samesource.service.cli import Stopped, stop_on_signals

        if __name__ == "__main__":  # workers import this file again
            with stop_on_signals():
                try:
                    LocalExecutor(2).map(time.sleep, [120] * 4)
                except Stopped:
                    print("stopped", flush=True)
                    sys.exit(3)
    """), encoding="utf-8")
    proc = subprocess.Popen([sys.executable, str(script)], cwd=ROOT, stdout=subprocess.PIPE,
                            text=True, start_new_session=True)
    try:
        wait_for(lambda: len(group_members(proc.pid)) >= 5, 60, "the pool's worker processes")
        t0 = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        stdout, _ = proc.communicate(timeout=30)
        # the tasks sleep 120 s: ending well before that means the workers were not awaited
        assert time.monotonic() - t0 < 30
        assert proc.returncode == 3 and "stopped" in stdout
        wait_for(lambda: not group_members(proc.pid), 15, "every process of the run to end")
    finally:
        kill_group(proc.pid)
