"""Analysis jobs: state, attempts and errors (failed jobs are visible here)."""

from __future__ import annotations

from typing import Literal

from fastapi import APIRouter, Depends, Path, Query, Request
from sqlalchemy import func, select

from server.errors import NotFound
from server.security import Principal, require_role
from server.services.access import check_record
from server.storage import queries
from server.storage.tables import Job

router = APIRouter(prefix="/api/v1", tags=["jobs"])


@router.get("/jobs", summary="Jobs by state (default: failed), newest first, with queue counts")
def list_jobs(request: Request, state: Literal["queued", "running", "done", "failed"] = "failed",
              limit: int = Query(100, ge=1, le=1000), principal: Principal = Depends(require_role("viewer"))):
    with request.app.state.db.read() as s:
        rows = s.scalars(select(Job).where(Job.state == state).order_by(Job.id.desc()).limit(limit)).all()
        counts = dict(s.execute(select(Job.state, func.count()).group_by(Job.state)).all())
        if principal.site_id is not None:
            rows = [j for j in rows if _visible(s, principal, j.record_id)]
        return {"ok": True, "counts": counts, "jobs": [queries.job_dict(j) for j in rows]}


def _visible(s, principal, record_id: int) -> bool:
    try:
        check_record(s, principal, record_id)
    except Exception:
        return False
    return True


@router.get("/jobs/{job_id}", summary="One analysis job")
def get_job(request: Request, job_id: int = Path(ge=1, le=2**63 - 1),
            principal: Principal = Depends(require_role("viewer"))):
    with request.app.state.db.read() as s:
        job = s.get(Job, job_id)
        if job is None:
            raise NotFound(f"no job {job_id}", field="job_id")
        check_record(s, principal, job.record_id)
        return {"ok": True, "job": queries.job_dict(job)}
