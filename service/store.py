"""Every read and write of the service's tables, for the HTTP routes and the job runner.

Objects leave this module as plain dicts (no ORM instances outside a session). Every query
an HTTP route makes is scoped to one tenant: another tenant's id is simply not found.
"""

from __future__ import annotations

import secrets
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import delete, func, select, update

from . import tokens
from .db import Database
from .models import Analysis, ApiToken, Dataset, Tenant, utcnow

STATUSES = ("queued", "running", "succeeded", "failed")


def new_id(prefix: str) -> str:
    return f"{prefix}_{secrets.token_hex(12)}"


def _can_exist(object_id: str) -> bool:
    """False for an id no object can have: PostgreSQL text holds no NUL character, and
    asking for one there is a database error, not "not found"."""
    return "\x00" not in object_id


def iso(dt: datetime | None) -> str | None:
    """UTC timestamp text; SQLite hands back naive datetimes, which are UTC here."""
    if dt is None:
        return None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=UTC)
    return dt.astimezone(UTC).isoformat().replace("+00:00", "Z")


def _aware(dt: datetime | None) -> datetime | None:
    if dt is not None and dt.tzinfo is None:
        return dt.replace(tzinfo=UTC)
    return dt


@dataclass(frozen=True)
class Claim:
    """An analysis this runner has claimed: the id and the attempt it runs."""

    analysis_id: str
    attempt: int
    runner: str


class Store:
    def __init__(self, db: Database) -> None:
        self.db = db

    # ------------------------------------------------------------------ tenants and tokens

    def create_token(self, tenant_name: str) -> str:
        """A new token for the tenant (created if it does not exist). The token is returned
        once and never stored."""
        token, key_id = tokens.new_token()
        with self.db.writing() as s:
            tenant = s.scalar(select(Tenant).where(Tenant.name == tenant_name))
            if tenant is None:
                tenant = Tenant(id=new_id("tn"), name=tenant_name)
                s.add(tenant)
                s.flush()
            s.add(ApiToken(key_id=key_id, tenant_id=tenant.id, token_sha256=tokens.token_hash(token)))
        return token

    def tenant_for_token(self, token: str) -> dict | None:
        key_id = tokens.key_id_of(token)
        if key_id is None:
            return None
        with self.db.reading() as s:
            row = s.execute(select(ApiToken.token_sha256, Tenant.id, Tenant.name)
                            .join(Tenant, Tenant.id == ApiToken.tenant_id)
                            .where(ApiToken.key_id == key_id)).first()
        if row is None or not tokens.matches(token, row[0]):
            return None
        return {"id": row[1], "name": row[2]}

    # ------------------------------------------------------------------ datasets

    def add_dataset(self, tenant_id: str, dataset_id: str, **fields: Any) -> dict:
        with self.db.writing() as s:
            ds = Dataset(id=dataset_id, tenant_id=tenant_id, created_at=utcnow(), **fields)
            s.add(ds)
            s.flush()
            return _dataset(ds)

    def get_dataset(self, tenant_id: str, dataset_id: str) -> dict | None:
        if not _can_exist(dataset_id):
            return None
        with self.db.reading() as s:
            ds = s.scalar(select(Dataset).where(Dataset.id == dataset_id,
                                                Dataset.tenant_id == tenant_id))
            return _dataset(ds) if ds else None

    def find_dataset_by_sha256(self, tenant_id: str, sha256: str) -> dict | None:
        """The tenant's earliest dataset holding exactly these bytes, if any."""
        with self.db.reading() as s:
            ds = s.scalar(select(Dataset).where(Dataset.tenant_id == tenant_id, Dataset.sha256 == sha256)
                          .order_by(Dataset.created_at, Dataset.id).limit(1))
            return _dataset(ds) if ds else None

    def list_datasets(self, tenant_id: str, *, limit: int, offset: int) -> tuple[list[dict], int]:
        with self.db.reading() as s:
            total = s.scalar(select(func.count()).select_from(Dataset)
                             .where(Dataset.tenant_id == tenant_id))
            rows = s.scalars(select(Dataset).where(Dataset.tenant_id == tenant_id)
                             .order_by(Dataset.created_at.desc(), Dataset.id)
                             .limit(limit).offset(offset)).all()
            return [_dataset(d) for d in rows], int(total or 0)

    def delete_dataset(self, tenant_id: str, dataset_id: str) -> dict | None:
        """Delete the dataset and its analyses; returns what was deleted (None: not found)."""
        if not _can_exist(dataset_id):
            return None
        with self.db.writing() as s:
            ds = s.scalar(select(Dataset).where(Dataset.id == dataset_id,
                                                Dataset.tenant_id == tenant_id))
            if ds is None:
                return None
            out = _dataset(ds)
            # explicit, not only ON DELETE CASCADE: SQLite enforces it only with the pragma on
            ids = s.scalars(select(Analysis.id).where(Analysis.dataset_id == dataset_id)).all()
            s.execute(delete(Analysis).where(Analysis.dataset_id == dataset_id))
            s.delete(ds)
            out["analysis_ids"] = list(ids)
            return out

    def stored_paths(self) -> set[str]:
        """Every dataset's stored file (relative to the data folder), across tenants."""
        with self.db.reading() as s:
            return set(s.scalars(select(Dataset.stored_path)).all())

    def count_datasets(self) -> int:
        with self.db.reading() as s:
            return int(s.scalar(select(func.count()).select_from(Dataset)) or 0)

    # ------------------------------------------------------------------ analyses

    def add_analysis(self, tenant_id: str, dataset_id: str, design: dict, options: dict) -> dict:
        with self.db.writing() as s:
            a = Analysis(id=new_id("an"), tenant_id=tenant_id, dataset_id=dataset_id,
                         design=design, options=options, status="queued", stage=None, done=0,
                         total=0, attempts=0, created_at=utcnow())
            s.add(a)
            s.flush()
            return _analysis(a)

    def get_analysis(self, tenant_id: str, analysis_id: str, *, with_report: bool = False) -> dict | None:
        if not _can_exist(analysis_id):
            return None
        with self.db.reading() as s:
            a = s.scalar(select(Analysis).where(Analysis.id == analysis_id,
                                                Analysis.tenant_id == tenant_id))
            return _analysis(a, with_report=with_report) if a else None

    def list_analyses(self, tenant_id: str, *, dataset_id: str | None, limit: int,
                      offset: int) -> tuple[list[dict], int]:
        if dataset_id is not None and not _can_exist(dataset_id):
            return [], 0
        where = [Analysis.tenant_id == tenant_id]
        if dataset_id is not None:
            where.append(Analysis.dataset_id == dataset_id)
        with self.db.reading() as s:
            total = s.scalar(select(func.count()).select_from(Analysis).where(*where))
            rows = s.scalars(select(Analysis).where(*where)
                             .order_by(Analysis.created_at.desc(), Analysis.id)
                             .limit(limit).offset(offset)).all()
            return [_analysis(a) for a in rows], int(total or 0)

    # ------------------------------------------------------------------ the job queue

    def claim_next(self, runner: str) -> Claim | None:
        """Take the oldest queued analysis for ``runner`` (atomic: two runners never get the
        same one)."""
        for _ in range(5):  # another runner may win the row between select and update
            with self.db.writing() as s:
                aid = s.scalar(select(Analysis.id).where(Analysis.status == "queued")
                               .order_by(Analysis.created_at, Analysis.id).limit(1))
                if aid is None:
                    return None
                now = utcnow()
                n = s.execute(update(Analysis)
                              .where(Analysis.id == aid, Analysis.status == "queued")
                              .values(status="running", runner=runner,
                                      attempts=Analysis.attempts + 1, started_at=now,
                                      heartbeat_at=now, stage="starting", done=0,
                                      total=0)).rowcount
                if n == 1:
                    attempt = s.scalar(select(Analysis.attempts).where(Analysis.id == aid))
                    return Claim(aid, int(attempt), runner)
        return None

    def job_inputs(self, analysis_id: str) -> dict | None:
        """What a job needs: the dataset's stored file and name, the design and options."""
        with self.db.reading() as s:
            row = s.execute(select(Analysis.design, Analysis.options, Dataset.stored_path,
                                   Dataset.name, Dataset.sha256)
                            .join(Dataset, Dataset.id == Analysis.dataset_id)
                            .where(Analysis.id == analysis_id)).first()
        if row is None:
            return None
        return {"design": row[0], "options": row[1], "stored_path": row[2], "name": row[3],
                "sha256": row[4]}

    def _mine(self, claim: Claim):
        return (Analysis.id == claim.analysis_id, Analysis.runner == claim.runner,
                Analysis.attempts == claim.attempt, Analysis.status == "running")

    def set_progress(self, claim: Claim, stage: str, done: int, total: int) -> bool:
        """Record progress; False when this run no longer owns the analysis (deleted,
        re-queued after its runner was taken for dead, or finished)."""
        with self.db.writing() as s:
            return s.execute(update(Analysis).where(*self._mine(claim))
                             .values(stage=stage[:40], done=int(done), total=int(total),
                                     heartbeat_at=utcnow())).rowcount == 1

    def finish(self, claim: Claim, *, report: str | None = None, error: dict | None = None) -> bool:
        status = "failed" if error is not None else "succeeded"
        values: dict[str, Any] = {"status": status, "finished_at": utcnow(), "error": error,
                                  "report": report, "heartbeat_at": utcnow()}
        if status == "succeeded":
            values["stage"] = "done"
        with self.db.writing() as s:
            return s.execute(update(Analysis).where(*self._mine(claim)).values(**values)
                             ).rowcount == 1

    def release(self, claim: Claim) -> bool:
        """Put a claimed analysis back in the queue (the service is stopping); the attempt
        does not count."""
        with self.db.writing() as s:
            return s.execute(update(Analysis).where(*self._mine(claim))
                             .values(status="queued", runner=None, stage=None, done=0, total=0,
                                     attempts=Analysis.attempts - 1)).rowcount == 1

    def release_for_retry(self, claim: Claim) -> bool:
        """Back to the queue after its worker died; the attempt counts."""
        with self.db.writing() as s:
            return s.execute(update(Analysis).where(*self._mine(claim))
                             .values(status="queued", runner=None, stage=None, done=0,
                                     total=0)).rowcount == 1

    def heartbeat(self, claims: Iterable[Claim]) -> None:
        claims = list(claims)
        if not claims:
            return
        now = utcnow()
        with self.db.writing() as s:
            for c in claims:
                s.execute(update(Analysis).where(*self._mine(c)).values(heartbeat_at=now))

    def recover(self, *, lease_seconds: float, max_attempts: int,
                runner_is_dead: Callable[[str], bool]) -> dict[str, list[str]]:
        """Analyses left running by a runner that is gone: back to the queue, or failed with
        the reason when they were interrupted ``max_attempts`` times already.

        A runner is gone when ``runner_is_dead(runner)`` says so (a process on this machine
        that no longer exists) or its heartbeat is older than the lease.
        """
        stale_before = utcnow() - timedelta(seconds=lease_seconds)
        out: dict[str, list[str]] = {"requeued": [], "failed": []}
        with self.db.writing() as s:
            rows = s.execute(select(Analysis.id, Analysis.runner, Analysis.heartbeat_at,
                                    Analysis.attempts)
                             .where(Analysis.status == "running")).all()
            for aid, runner, beat, attempts in rows:
                beat = _aware(beat)
                if not (runner_is_dead(runner or "") or beat is None or beat < stale_before):
                    continue
                if attempts >= max_attempts:
                    s.execute(update(Analysis).where(Analysis.id == aid,
                                                     Analysis.status == "running").values(
                        status="failed", finished_at=utcnow(), error={
                            "code": "interrupted",
                            "message": (f"the analysis was interrupted {attempts} times (the "
                                        "service or its worker stopped while it ran: killed, out "
                                        "of memory or restarted) and is not tried again; start "
                                        "a new analysis, perhaps with fewer bootstrap replicates"),
                            "field": None}))
                    out["failed"].append(aid)
                else:
                    s.execute(update(Analysis).where(Analysis.id == aid,
                                                     Analysis.status == "running").values(
                        status="queued", runner=None, stage=None, done=0, total=0))
                    out["requeued"].append(aid)
        return out

    def counts_by_status(self) -> dict[str, int]:
        with self.db.reading() as s:
            rows = s.execute(select(Analysis.status, func.count()).group_by(Analysis.status)).all()
        return {status: int(n) for status, n in rows}


# ---------------------------------------------------------------------- serialisation


_DETAILS = ("sheet", "sheets", "draft_left_out", "draft_notes", "sheet_columns")


def _dataset(ds: Dataset) -> dict:
    return {
        "id": ds.id,
        "name": ds.name,
        "rows": ds.rows,
        "columns": list(ds.columns),
        "numeric_columns": list(ds.numeric_columns),
        "format": ds.format,
        "sha256": ds.sha256,
        "size_bytes": ds.size_bytes,
        "created_at": iso(ds.created_at),
        "draft_design": ds.draft_design,
        "warnings": list(ds.warnings or []),
        **{k: v for k, v in (ds.details or {}).items() if k in _DETAILS},
        "stored_path": ds.stored_path,
        "tenant_id": ds.tenant_id,
    }


def _analysis(a: Analysis, *, with_report: bool = False) -> dict:
    out = {
        "id": a.id,
        "dataset_id": a.dataset_id,
        "status": a.status,
        "progress": {"stage": a.stage, "done": a.done, "total": a.total},
        "error": a.error,
        "design": a.design,
        "options": a.options,
        "attempts": a.attempts,
        "created_at": iso(a.created_at),
        "started_at": iso(a.started_at),
        "finished_at": iso(a.finished_at),
        "tenant_id": a.tenant_id,
    }
    if with_report:
        out["report_text"] = a.report
    return out
