"""Health check (no authentication)."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse
from sqlalchemy import text

router = APIRouter(tags=["health"])


@router.get("/healthz", summary="Liveness and database check (no login needed)")
def healthz(request: Request):
    db = request.app.state.db
    try:
        with db.read() as s:
            s.execute(text("SELECT 1"))
    except Exception as exc:  # report, don't raise: a health check answers
        return JSONResponse({"ok": False, "database": "unreachable", "detail": type(exc).__name__},
                            status_code=503, headers={"Retry-After": "5"})
    return {"ok": True, "database": db.dialect}
