"""report["timings"]: seconds per stage of an analysis, and the peak memory the platform reports.

Stages are the pipeline's progress stages; a sub-stage (the bootstrap, inside "paths") is timed
from its first progress call to its last (done == total), and what follows it until the next
stage counts to the stage it sits in. Peak memory is ``resource.getrusage``'s maximum resident
set size of this process since it started (so an earlier, larger analysis in the same process
shows through; bootstrap workers in other processes are not counted); None where the platform
has no ``resource`` module (Windows).
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable

Progress = Callable[[str, int, int], None]
SUB_STAGES = {"bootstrap": "paths"}  # sub-stage -> the stage it runs inside


def peak_memory_mb() -> float | None:
    """Peak resident memory of this process in MB (10^6 bytes), or None where not available."""
    try:
        import resource
    except ImportError:  # Windows
        return None
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    # Linux reports KiB, macOS bytes
    return round(peak / 1e6 if sys.platform == "darwin" else peak * 1024 / 1e6, 1)


class StageClock:
    """Wraps a progress callback and times the stages it is told about."""

    def __init__(self, clock: Callable[[], float] = time.perf_counter) -> None:
        self._clock = clock
        self._start = self._last = clock()
        self._stage: str | None = None
        self.seconds: dict[str, float] = {}

    def timed(self, progress: Progress) -> Progress:
        def step(stage: str, done: int, total: int) -> None:
            self.mark(stage, done, total)
            progress(stage, done, total)
        return step

    def mark(self, stage: str, done: int = 0, total: int = 0) -> None:
        now = self._clock()
        if self._stage is not None:
            self.seconds[self._stage] = self.seconds.get(self._stage, 0.0) + (now - self._last)
        self._last = now
        if stage in SUB_STAGES and total and done >= total:
            stage = SUB_STAGES[stage]  # the sub-stage is over: back to its stage
        self._stage = stage

    def finish(self) -> dict[str, float | None]:
        """{stage: seconds, ..., "total": seconds, "peak_memory_mb": MB or None}."""
        self.mark("report")
        out: dict[str, float | None] = {k: round(v, 4) for k, v in self.seconds.items()}
        out["total"] = round(self._last - self._start, 4)
        out["peak_memory_mb"] = peak_memory_mb()
        return out


__all__ = ["StageClock", "peak_memory_mb", "SUB_STAGES"]
