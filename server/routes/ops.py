"""Operations endpoints: ``/metrics`` (Prometheus text format) and ``/readyz`` (no login needed).

``/healthz`` (liveness + database) lives in ``health.py``. ``/readyz`` answers 200 only when the
database is reachable and at least one analysis worker has written a heartbeat within
``ready_max_heartbeat_age_s``; otherwise 503 with the reason, so a load balancer or an operator
sees that records would be accepted but not analysed. ``/metrics`` needs the bearer token
``HALFWATCH_METRICS_TOKEN`` when that is set. Both are probes, kept out of the OpenAPI schema.
"""

from __future__ import annotations

import hmac

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse, Response
from sqlalchemy import text

from server.errors import Unauthorized

router = APIRouter(tags=["operations"])


@router.get("/metrics", summary="Prometheus metrics (text exposition format)", include_in_schema=False,
            response_class=Response, responses={200: {"content": {"text/plain": {}}}})
def metrics(request: Request):
    settings = request.app.state.settings
    token = settings.metrics_token.get_secret_value()
    if token:
        given = request.headers.get("authorization", "")
        if not hmac.compare_digest(given.encode(), f"Bearer {token}".encode()):
            raise Unauthorized("/metrics needs the bearer token set in HALFWATCH_METRICS_TOKEN "
                               "(Authorization: Bearer <token>)", field="authorization",
                               headers={"WWW-Authenticate": "Bearer"})
    body, content_type = request.app.state.metrics.render(request.headers.get("accept"))
    return Response(body, media_type=content_type.split(";")[0], headers={"Content-Type": content_type})


@router.get("/readyz", summary="Readiness: database reachable and an analysis worker alive",
            include_in_schema=False)
def readyz(request: Request):
    from server.ops.heartbeat import beats, is_live
    from server.storage.tables import utcnow

    db, settings = request.app.state.db, request.app.state.settings
    max_age = settings.ready_max_heartbeat_age_s
    try:
        with db.read() as s:
            s.execute(text("SELECT 1"))
            workers = beats(s, "worker")
    except Exception as exc:  # report, don't raise
        return _not_ready({"database": "unreachable", "detail": type(exc).__name__})
    now = utcnow()
    live = [w for w in workers if is_live(w, max_age, now)]
    info = {"database": db.dialect, "workers_live": len(live)}
    if not live:
        if workers:
            age = (now - workers[0].beat_at).total_seconds()
            reason = (f"no analysis worker beat in the last {max_age:g} s (the latest, {workers[0].id}, "
                      f"{age:.0f} s ago, {workers[0].status})")
        else:
            reason = "no analysis worker has ever run; start `halfwatch worker` or serve --with-worker"
        return _not_ready({**info, "reason": reason})
    info["worker_heartbeat_age_s"] = round(min((now - w.beat_at).total_seconds() for w in live), 3)
    return {"ok": True, **info}


def _not_ready(info: dict) -> JSONResponse:
    return JSONResponse({"ok": False, **info}, status_code=503, headers={"Retry-After": "10"})
