"""Analysis jobs: state, attempts and errors (failed jobs are visible here)."""

from __future__ import annotations

from typing import Literal

from fastapi import APIRouter, Depends, Path, Query, Request
from sqlalchemy import func, select

from server.errors import NotFound
from server.security import Principal, require_role
from server.services.access import check, jobs_condition
from server.storage import queries
from server.storage.tables import Job

router = APIRouter(prefix="/api/v1", tags=["jobs"])


@router.get("/jobs", summary="Jobs by state (default: failed), newest first, with queue counts")
def list_jobs(request: Request, state: Literal["queued", "running", "done", "failed"] = "failed",
              limit: int = Query(100, ge=1, le=1000), principal: Principal = Depends(require_role("viewer"))):
    scope = jobs_condition(principal.site_id)  # a site-limited caller: its site's jobs and counts only
    rows_q = select(Job).where(Job.state == state)
    counts_q = select(Job.state, func.count()).group_by(Job.state)
    if scope is not None:
        rows_q, counts_q = rows_q.where(scope), counts_q.where(scope)
    with request.app.state.db.read() as s:
        rows = s.scalars(rows_q.order_by(Job.id.desc()).limit(limit)).all()
        counts = dict(s.execute(counts_q).all())
        return {"ok": True, "counts": counts, "jobs": [queries.job_dict(j) for j in rows]}


@router.get("/jobs/{job_id}", summary="One analysis job")
def get_job(request: Request, job_id: int = Path(ge=1, le=2**63 - 1),
            principal: Principal = Depends(require_role("viewer"))):
    with request.app.state.db.read() as s:
        job = s.get(Job, job_id)
        if job is None:
            raise NotFound(f"no job {job_id}", field="job_id")
        check(s, principal, "job", job_id)
        return {"ok": True, "job": queries.job_dict(job)}
