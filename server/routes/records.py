"""Reading records: one record's result, spectrum and waveform; a point's records, trend, waterfall."""

from __future__ import annotations

import datetime as dt

from fastapi import APIRouter, Depends, Query, Request
from sqlalchemy import select

from server.security import Principal, require_role
from server.services.access import check_point, check_record
from server.storage import queries
from server.storage.tables import Record
from server.times import ApiTime

router = APIRouter(prefix="/api/v1", tags=["records"])
viewer = require_role("viewer")


@router.get("/records/{record_id}", summary="One record: metadata, analysis job and current result")
def get_record(request: Request, record_id: int, principal: Principal = Depends(viewer)):
    with request.app.state.db.read() as s:
        check_record(s, principal, record_id)
        return queries.record_detail(s, record_id)


@router.get("/records/{record_id}/spectrum", summary="Decimated amplitude spectrum and 0.5X envelope")
def get_spectrum(request: Request, record_id: int, principal: Principal = Depends(viewer)):
    with request.app.state.db.read() as s:
        check_record(s, principal, record_id)
        return queries.record_spectrum(s, record_id)


@router.get("/records/{record_id}/waveform", summary="The waveform, min/max decimated to max_points")
def get_waveform(request: Request, record_id: int, max_points: int = Query(4000, ge=2, le=200_000),
                 principal: Principal = Depends(viewer)):
    with request.app.state.db.read() as s:
        check_record(s, principal, record_id)
        return queries.record_waveform(s, record_id, max_points)


@router.get("/points/{point_id}/records", summary="Records of a point, newest first")
def list_records(request: Request, point_id: int, limit: int = Query(50, ge=1, le=1000),
                 before: ApiTime | None = Query(None, description="only records measured before this"),
                 principal: Principal = Depends(viewer)):
    with request.app.state.db.read() as s:
        check_point(s, principal, point_id)
        q = select(Record).where(Record.point_id == point_id)
        if before is not None:
            q = q.where(Record.measured_at < before)
        rows = s.scalars(q.order_by(Record.measured_at.desc()).limit(limit)).all()
        return {"ok": True, "point_id": point_id, "records": [queries.record_dict(r) for r in rows]}


@router.get("/points/{point_id}/trend", summary="A result metric over time, bucketed to <= max_points")
def get_trend(request: Request, point_id: int,
              metric: str = Query("subharmonic.velocity_rms_mm_s", max_length=80,
                                  description="a result field, e.g. overall.velocity_rms_mm_s or "
                                              "orders.1X.accel_peak (each names its measure)"),
              start: ApiTime | None = Query(None, description="default: 30 days before end"),
              end: ApiTime | None = Query(None, description="default: now"),
              max_points: int = Query(1000, ge=2, le=20_000),
              principal: Principal = Depends(viewer)):
    end = end or dt.datetime.now(dt.UTC)
    start = start or end - dt.timedelta(days=30)
    with request.app.state.db.read() as s:
        check_point(s, principal, point_id)
        return {"point_id": point_id, "start": queries.iso(start), "end": queries.iso(end),
                **queries.trend(s, point_id, metric, start, end, max_points)}


@router.get("/points/{point_id}/waterfall", summary="The last n spectra of a point, oldest first")
def get_waterfall(request: Request, point_id: int, n: int = Query(20, ge=1, le=200),
                  principal: Principal = Depends(viewer)):
    with request.app.state.db.read() as s:
        check_point(s, principal, point_id)
        return queries.waterfall(s, point_id, n)
