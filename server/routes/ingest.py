"""Ingestion API: raw float32 or JSON records, and file uploads (WAV, CSV, UFF-58)."""

from __future__ import annotations

import base64
import binascii

import numpy as np
from fastapi import APIRouter, Depends, File, Form, Query, Request, UploadFile
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from pydantic import ValidationError
from starlette.concurrency import run_in_threadpool

from server.errors import AppError, Unauthorized
from server.schemas import RecordJson
from server.security import _NO_CREDENTIALS, Principal, authorize, has_credentials, require_role
from server.services.ingest import IngestOutcome, Limits, ingest_record
from server.services.ingest_files import ingest_file
from server.times import ApiTime

router = APIRouter(prefix="/api/v1", tags=["ingest"])

RAW_TYPES = ("application/octet-stream", "application/x-float32")

_RAW_DOC = {
    "requestBody": {
        "required": True,
        "content": {
            "application/octet-stream": {"schema": {"type": "string", "format": "binary"}},
            "application/json": {"schema": RecordJson.model_json_schema()},
        },
    }
}


def _answer(request: Request, outcome: IngestOutcome) -> JSONResponse:
    body = {"ok": True, "record_id": outcome.record_id, "job_id": outcome.job_id, "created": outcome.created,
            "links": {"record": f"/api/v1/records/{outcome.record_id}",
                      "job": f"/api/v1/jobs/{outcome.job_id}" if outcome.job_id else None}}
    headers = {"Location": f"/api/v1/records/{outcome.record_id}"}
    return JSONResponse(body, status_code=201 if outcome.created else 200, headers=headers)


def _limits(request: Request) -> Limits:
    return Limits.from_settings(request.app.state.settings)


@router.post("/points/{point_id}/records", status_code=201, openapi_extra=_RAW_DOC,
             summary="Send one record (raw float32 body + query parameters, or JSON)")
async def post_record(
    request: Request,
    point_id: int,
    fs_hz: float | None = Query(None, description="sample rate, Hz (raw body)"),
    units: str | None = Query(None, description="g, m/s2 or mm/s2 (raw body)"),
    measured_at: ApiTime | None = Query(None, description="ISO 8601 with a zone (raw body), not a number"),
    speed_hz: float | None = Query(None, description="shaft speed during the record, rev/s"),
    speed_source: str | None = Query(None, max_length=32),
    client_ref: str | None = Query(None, max_length=200, description="your id for safe retries"),
):
    """Raw little-endian float32 body with metadata in the query, or JSON (``RecordJson``); technician role.
    201 with the record id once the record and its analysis job are committed; 200 for a repeat of a
    ``client_ref`` already stored."""
    if not has_credentials(request):  # before reading a large body
        raise Unauthorized(_NO_CREDENTIALS)
    ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
    body = await request.body()
    try:  # a refusal of the input is shown only once the caller may ingest (403 before 422)
        parsed = _parse_body(ctype, body, fs_hz=fs_hz, units=units, measured_at=measured_at,
                             speed_hz=speed_hz, speed_source=speed_source, client_ref=client_ref)
    except (AppError, RequestValidationError) as exc:
        parsed = exc

    def work() -> IngestOutcome:  # authentication and storage in one thread hop
        principal = authorize(request, "technician")
        if isinstance(parsed, Exception):
            raise parsed
        samples, meta = parsed
        return ingest_record(request.app.state.db, point_id=point_id, samples=samples, origin="api",
                             uploader=principal.label, limits=_limits(request), site_scope=principal.site_id,
                             **meta)

    return _answer(request, await run_in_threadpool(work))


def _parse_body(ctype: str, body: bytes, **query) -> tuple[np.ndarray, dict]:
    """(samples, metadata) from a JSON body or a raw float32 body with the metadata in ``query``."""
    fs_hz, units, measured_at = query["fs_hz"], query["units"], query["measured_at"]
    speed_hz, speed_source, client_ref = query["speed_hz"], query["speed_source"], query["client_ref"]
    if ctype == "application/json":
        try:
            doc = RecordJson.model_validate_json(body)
        except ValidationError as exc:
            raise RequestValidationError([{**e, "loc": ("body", *e["loc"])}
                                          for e in exc.errors()]) from None
        return _json_samples(doc), dict(fs_hz=doc.fs_hz, units=doc.units, measured_at=doc.measured_at,
                                        speed_hz=doc.speed_hz, speed_source=doc.speed_source,
                                        client_ref=doc.client_ref, tach_pulses_s=doc.tach_pulses_s,
                                        tach_samples=doc.tach_samples, pulses_per_rev=doc.pulses_per_rev,
                                        tach_level=doc.tach_level)
    if ctype in RAW_TYPES or ctype == "":
        for name, value in (("fs_hz", fs_hz), ("units", units), ("measured_at", measured_at)):
            if value is None:
                raise AppError(f"{name} is missing; with a raw body give fs_hz, units and measured_at "
                               "as query parameters", field=name, status=422, code="invalid")
        if len(body) % 4:
            raise AppError(f"raw body has {len(body)} bytes, not a whole number of float32 samples; send "
                           "little-endian float32 values", field="body")
        return np.frombuffer(body, dtype="<f4"), dict(fs_hz=fs_hz, units=units, measured_at=measured_at,
                                                      speed_hz=speed_hz, speed_source=speed_source,
                                                      client_ref=client_ref)
    raise AppError(f"content type {ctype!r} is not accepted here; send application/octet-stream "
                   "(float32) or application/json, or use .../records/file for files",
                   status=415, code="unsupported_media_type", field="content-type")


def _json_samples(doc: RecordJson) -> np.ndarray:
    if (doc.samples_b64 is None) == (doc.samples is None):
        raise AppError("give exactly one of samples_b64 (base64 float32) or samples (list of numbers)",
                       field="samples_b64", status=422, code="invalid")
    if doc.samples is not None:
        return np.asarray(doc.samples, dtype=np.float64)
    try:
        raw = base64.b64decode(doc.samples_b64, validate=True)
    except (binascii.Error, ValueError):
        raise AppError("samples_b64 is not valid base64", field="samples_b64", status=422,
                       code="invalid") from None
    width = 4 if doc.dtype == "float32" else 8
    if len(raw) % width:
        raise AppError(f"samples_b64 holds {len(raw)} bytes, not a whole number of {doc.dtype} values",
                       field="samples_b64", status=422, code="invalid")
    return np.frombuffer(raw, dtype="<f4" if width == 4 else "<f8")


@router.post("/points/{point_id}/records/file", status_code=201,
             summary="Upload one record file (WAV, CSV or UFF-58)")
async def post_record_file(
    request: Request,
    point_id: int,
    file: UploadFile = File(..., description="a .wav, .csv or .uff/.unv file"),
    measured_at: ApiTime | None = Form(None, description="ISO 8601 with a zone, not a number"),
    units: str | None = Form(None, description="g, m/s2 or mm/s2 (if the file does not say)"),
    fs_hz: float | None = Form(None, description="sample rate, Hz (CSV without a time column)"),
    speed_hz: float | None = Form(None),
    speed_source: str | None = Form(None, max_length=32),
    client_ref: str | None = Form(None, max_length=200),
    tach_channel: int | None = Form(None, ge=1, description="channel of the file with tach pulses, from 1"),
    pulses_per_rev: int | None = Form(None, ge=1, le=360, description="tach pulses per revolution"),
    tach_level: float | None = Form(None, description="tach trigger level (default: halfway up)"),
    principal: Principal = Depends(require_role("technician")),
):
    data = await file.read()
    outcome = await run_in_threadpool(
        ingest_file, request.app.state.db, point_id=point_id, data=data, filename=file.filename or "upload",
        measured_at=measured_at, units=units, fs_hz=fs_hz, speed_hz=speed_hz, speed_source=speed_source,
        client_ref=client_ref, origin="upload", uploader=principal.label, limits=_limits(request),
        site_scope=principal.site_id, tach_file_channel=tach_channel, pulses_per_rev=pulses_per_rev,
        tach_level=tach_level)
    return _answer(request, outcome)
