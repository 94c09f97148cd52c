"""Every read and write of the service's tables, for the HTTP routes and the job runner.

Objects leave this module as plain dicts (no ORM instances outside a session). Every query
an HTTP route makes is scoped to one tenant: another tenant's id is simply not found.
"""

from __future__ import annotations

import hashlib
import secrets
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import delete, func, select, text, update

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

    def create_token(self, tenant_name: str, *, expires_days: float | None = None) -> str:
        """A new token for the tenant (created if it does not exist), valid for
        ``expires_days`` days (None: until revoked). The token is returned once and never
        stored."""
        token, key_id = tokens.new_token()
        now = utcnow()
        expires = None if expires_days is None else now + timedelta(days=expires_days)
        with self.db.writing() as s:
            tenant = s.scalar(select(Tenant).where(Tenant.name == tenant_name))
            if tenant is None:
                tenant = Tenant(id=new_id("tn"), name=tenant_name)
                s.add(tenant)
                s.flush()
            s.add(ApiToken(key_id=key_id, tenant_id=tenant.id, token_sha256=tokens.token_hash(token),
                           created_at=now, expires_at=expires))
        return token

    def list_tokens(self, tenant_name: str) -> list[dict] | None:
        """The tenant's tokens, oldest first, without anything secret (None: no such
        tenant)."""
        with self.db.reading() as s:
            tenant = s.scalar(select(Tenant.id).where(Tenant.name == tenant_name))
            if tenant is None:
                return None
            rows = s.scalars(select(ApiToken).where(ApiToken.tenant_id == tenant)
                             .order_by(ApiToken.created_at, ApiToken.key_id)).all()
            return [{"key_id": t.key_id, "created_at": iso(t.created_at),
                     "last_used_at": iso(t.last_used_at), "expires_at": iso(t.expires_at),
                     "revoked_at": iso(t.revoked_at)} for t in rows]

    def revoke_token(self, key_id: str) -> bool | None:
        """Revoke a token from the next request on. True: revoked now; False: it already
        was; None: no token has that key id."""
        with self.db.writing() as s:
            t = s.get(ApiToken, key_id)
            if t is None:
                return None
            if t.revoked_at is not None:
                return False
            t.revoked_at = utcnow()
            return True

    LAST_USED_EVERY = timedelta(seconds=60)  # a write per request would be a write per request

    def tenant_for_token(self, token: str) -> dict | None:
        key_id = tokens.key_id_of(token)
        if key_id is None:
            return None
        with self.db.reading() as s:
            row = s.execute(select(ApiToken.token_sha256, Tenant.id, Tenant.name,
                                   ApiToken.revoked_at, ApiToken.expires_at, ApiToken.last_used_at)
                            .join(Tenant, Tenant.id == ApiToken.tenant_id)
                            .where(ApiToken.key_id == key_id)).first()
        if row is None or not tokens.matches(token, row[0]):
            return None
        now = utcnow()
        if row[3] is not None or (row[4] is not None and _aware(row[4]) <= now):
            return None
        last = _aware(row[5])
        if last is None or now - last >= self.LAST_USED_EVERY:
            try:
                with self.db.writing() as s:
                    s.execute(update(ApiToken).where(ApiToken.key_id == key_id)
                              .values(last_used_at=now))
            except Exception:  # bookkeeping only: a full disk must not lock clients out
                pass
        return {"id": row[1], "name": row[2]}

    # ------------------------------------------------------------------ datasets

    def add_dataset(self, tenant_id: str, dataset_id: str, **fields: Any) -> dict:
        with self.db.writing() as s:
            ds = Dataset(id=dataset_id, tenant_id=tenant_id, created_at=utcnow(), **fields)
            s.add(ds)
            s.flush()
            return _dataset(ds)

    def add_dataset_once(self, tenant_id: str, dataset_id: str, *, sha256: str,
                         **fields: Any) -> tuple[dict, bool]:
        """Store the dataset unless the tenant already has one with exactly these bytes, in one
        write transaction: (the dataset, True) when stored, (the earlier one, False) when not.
        Two service processes storing the same bytes at once store them once: SQLite's write
        transactions run one at a time (BEGIN IMMEDIATE), and on PostgreSQL the transaction
        first takes an advisory lock named by the tenant and the hash."""
        with self.db.writing() as s:
            if self.db.dialect == "postgresql":
                key = int.from_bytes(hashlib.sha256(f"{tenant_id}/{sha256}".encode()).digest()[:8],
                                     "big", signed=True)
                s.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": key})
            earlier = s.scalar(select(Dataset).where(Dataset.tenant_id == tenant_id,
                                                     Dataset.sha256 == sha256)
                               .order_by(Dataset.created_at, Dataset.id).limit(1))
            if earlier is not None:
                return _dataset(earlier), False
            ds = Dataset(id=dataset_id, tenant_id=tenant_id, created_at=utcnow(), sha256=sha256,
                         **fields)
            s.add(ds)
            s.flush()
            return _dataset(ds), True

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
            ids = list(s.scalars(select(Analysis.id).where(Analysis.dataset_id == dataset_id)).all())
            # and the analyses that join it as a second source
            ids += [a.id for a in s.scalars(select(Analysis).where(Analysis.tenant_id == tenant_id,
                                                                   Analysis.sources.is_not(None))).all()
                    if dataset_id in (a.sources or {}).values()]
            s.execute(delete(Analysis).where(Analysis.id.in_(ids)))
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

    def add_analysis(self, tenant_id: str, dataset_id: str, design: dict, options: dict,
                     sources: dict[str, str] | None = None) -> dict:
        with self.db.writing() as s:
            a = Analysis(id=new_id("an"), tenant_id=tenant_id, dataset_id=dataset_id,
                         design=design, options=options, status="queued", stage=None, done=0,
                         total=0, attempts=0, created_at=utcnow(), sources=sources or None)
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

    def claim_next(self, runner: str, *, max_running_per_tenant: int | None = None
                   ) -> Claim | None:
        """Take the next queued analysis for ``runner`` (atomic: two runners never get the
        same one), round-robin across tenants: the tenant with the fewest analyses running,
        then the one whose last analysis started longest ago, then its oldest queued
        analysis. Tenants with ``max_running_per_tenant`` running wait."""
        for _ in range(5):  # another runner may win the row between select and update
            with self.db.writing() as s:
                tenant = self._next_tenant(s, max_running_per_tenant)
                if tenant is None:
                    return None
                aid = s.scalar(select(Analysis.id).where(Analysis.status == "queued",
                                                         Analysis.tenant_id == tenant)
                               .order_by(Analysis.created_at, Analysis.id).limit(1))
                if aid is None:
                    continue
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

    @staticmethod
    def _next_tenant(s, max_running: int | None) -> str | None:
        queued = s.execute(select(Analysis.tenant_id, func.min(Analysis.created_at))
                           .where(Analysis.status == "queued").group_by(Analysis.tenant_id)).all()
        if not queued:
            return None
        running = dict(s.execute(select(Analysis.tenant_id, func.count())
                                 .where(Analysis.status == "running")
                                 .group_by(Analysis.tenant_id)).all())
        started = dict(s.execute(select(Analysis.tenant_id, func.max(Analysis.started_at))
                                 .where(Analysis.tenant_id.in_([t for t, _ in queued]))
                                 .group_by(Analysis.tenant_id)).all())
        never = datetime.min.replace(tzinfo=UTC)
        order = sorted((int(running.get(t, 0)), _aware(started.get(t)) or never,
                        _aware(oldest) or never, t) for t, oldest in queued
                       if max_running is None or running.get(t, 0) < max_running)
        return order[0][3] if order else None

    def tenant_load(self, tenant_id: str) -> dict[str, int]:
        """The tenant's queued and running analyses and the bootstrap replicates they ask for."""
        with self.db.reading() as s:
            rows = s.execute(select(Analysis.status, Analysis.options)
                             .where(Analysis.tenant_id == tenant_id,
                                    Analysis.status.in_(("queued", "running")))).all()
        out = {"queued": 0, "running": 0, "replicates": 0}
        for status, options in rows:
            out[status] += 1
            out["replicates"] += int((options or {}).get("bootstrap") or 0)
        return out

    def oldest_queued_at(self) -> datetime | None:
        with self.db.reading() as s:
            return _aware(s.scalar(select(func.min(Analysis.created_at))
                                   .where(Analysis.status == "queued")))

    def owns(self, claim: Claim) -> bool:
        """True while this run still owns its analysis (not deleted, re-queued or finished)."""
        with self.db.reading() as s:
            return s.scalar(select(func.count()).select_from(Analysis)
                            .where(*self._mine(claim))) == 1

    def job_inputs(self, analysis_id: str) -> dict | None:
        """What a job needs: the dataset's stored file and name, the design and options."""
        with self.db.reading() as s:
            row = s.execute(select(Analysis.design, Analysis.options, Dataset.stored_path,
                                   Dataset.name, Dataset.sha256, Analysis.sources, Analysis.tenant_id)
                            .join(Dataset, Dataset.id == Analysis.dataset_id)
                            .where(Analysis.id == analysis_id)).first()
            if row is None:
                return None
            sources = {}
            for name, ds_id in (row[5] or {}).items():
                ds = s.scalar(select(Dataset).where(Dataset.id == ds_id, Dataset.tenant_id == row[6]))
                sources[name] = None if ds is None else {"stored_path": ds.stored_path, "name": ds.name}
        return {"design": row[0], "options": row[1], "stored_path": row[2], "name": row[3],
                "sha256": row[4], "sources": sources}

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
        "sources": dict(a.sources or {}),
        "attempts": a.attempts,
        "created_at": iso(a.created_at),
        "started_at": iso(a.started_at),
        "finished_at": iso(a.finished_at),
        "tenant_id": a.tenant_id,
    }
    if with_report:
        out["report_text"] = a.report
    return out
