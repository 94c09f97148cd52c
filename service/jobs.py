"""One analysis job, as it runs in a worker (a local pool process or a Dask worker).

The job calls samesource.analyze (as the command line does) and returns a small, picklable outcome: the
report.json text, or the error to store. It never raises for bad data or a bad design
(those are the analysis's error); anything else is logged with the analysis id and the code
locations only, and the stored error says "internal error".
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from .errors import input_error_body, safe_trace

log = logging.getLogger("samesource.jobs")

PROGRESS_EVERY = 0.5  # seconds between progress writes within one stage


@dataclass
class JobSpec:
    """Everything a worker needs; picklable. ``path`` (a local file) or ``data`` (the file's
    bytes, for workers that do not share the service's disk)."""

    analysis_id: str
    attempt: int
    runner: str
    name: str
    design: dict
    options: dict
    path: str | None = None
    data: bytes | None = field(default=None, repr=False)
    # second sources: NAME -> (local path or the file's bytes, file name for messages)
    sources: dict[str, tuple[Any, str]] = field(default_factory=dict, repr=False)


@dataclass
class Outcome:
    analysis_id: str
    report: str | None = None  # report.json text
    error: dict | None = None
    seconds: float = 0.0
    cancelled: bool = False


class Cancelled(Exception):
    """This run no longer owns its analysis (deleted, or re-queued elsewhere): stop it."""


class Throttle:
    """Passes a progress call on at each new stage, at the end, and otherwise at most every
    PROGRESS_EVERY seconds: bootstrap waves can come fast, and each is a database write."""

    def __init__(self, sink: Callable[[str, int, int], None], analysis_id: str) -> None:
        self._sink = sink
        self._id = analysis_id
        self._last = (None, 0.0)

    def __call__(self, stage: str, done: int, total: int) -> None:
        now = time.monotonic()
        last_stage, last_time = self._last
        if stage != last_stage or done >= total or now - last_time >= PROGRESS_EVERY:
            self._last = (stage, now)
            try:
                self._sink(stage, int(done), int(total))
            except Cancelled:
                raise
            except Exception as e:  # progress is best effort; the analysis goes on
                log.warning("progress of analysis %s not recorded: %s", self._id, safe_trace(e))


def run_job(spec: JobSpec, progress: Callable[[str, int, int], None], executor: Any = None
            ) -> Outcome:
    from samesource import analyze
    from samesource.errors import InputError
    from samesource.executor import StopRequested

    t0 = time.monotonic()
    source: Any = spec.data if spec.data is not None else spec.path
    try:
        report = analyze(source, spec.design, options=spec.options, name=spec.name,
                         progress=Throttle(progress, spec.analysis_id), executor=executor,
                         sources=spec.sources)
        text = report.to_json()
    except (Cancelled, StopRequested):
        log.info("analysis %s stopped: it no longer belongs to this run", spec.analysis_id)
        return Outcome(spec.analysis_id, cancelled=True)
    except InputError as e:
        log.info("analysis %s failed on its input: %s", spec.analysis_id, e.code)
        return Outcome(spec.analysis_id, error=input_error_body(e, field_prefix="design"),
                       seconds=time.monotonic() - t0)
    except Exception as e:
        log.error("analysis %s failed with an internal error: %s", spec.analysis_id, safe_trace(e))
        return Outcome(spec.analysis_id, error={
            "code": "internal_error",
            "message": (f"internal error while analysing (analysis {spec.analysis_id}); the "
                        "service's log has the details"),
            "field": None}, seconds=time.monotonic() - t0)
    return Outcome(spec.analysis_id, report=text, seconds=time.monotonic() - t0)
