"""Routes (walks of measurement points): list with due/overdue points, define, and upload a walk's ZIP."""

from __future__ import annotations

import tempfile

from fastapi import APIRouter, Depends, Request
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool

from server.errors import AppError
from server.schemas import RouteIn
from server.security import Principal, require_role
from server.services import assets
from server.services.access import check_route
from server.services.ingest import Limits
from server.services.route_upload import UploadLimits, upload_route
from server.storage import tree as tree_queries

router = APIRouter(prefix="/api/v1", tags=["routes"])
SPOOL_BYTES = 4 * 1024 * 1024  # a route upload keeps at most this much of its body in memory


@router.get("/routes", summary="Routes with each point's last reading, due time and status (ok/due/overdue)")
def list_routes(request: Request, principal: Principal = Depends(require_role("viewer"))):
    with request.app.state.db.read() as s:
        return tree_queries.routes_due(s, principal.site_id)


@router.post("/routes", status_code=201, summary="Define a route: ordered points, due intervals (engineer)")
def create_route(request: Request, body: RouteIn, principal: Principal = Depends(require_role("engineer"))):
    data = body.model_dump()
    return JSONResponse(assets.create(request.app.state.db, "route", data, principal), status_code=201)


@router.put("/routes/{route_id}", summary="Change a route and its stops (engineer)")
def update_route(request: Request, route_id: int, body: RouteIn,
                 principal: Principal = Depends(require_role("engineer"))):
    data = body.model_dump(exclude_unset=True)
    return assets.update(request.app.state.db, "route", route_id, data, principal)


_ZIP_DOC = {"requestBody": {"required": True, "content": {
    "multipart/form-data": {"schema": {"type": "object", "required": ["file"],
                                       "properties": {"file": {"type": "string", "format": "binary"}}}},
    "application/zip": {"schema": {"type": "string", "format": "binary"}}}}}


@router.post("/routes/{route_id}/uploads", openapi_extra=_ZIP_DOC,
             summary="Upload a walked route: ZIP of readings + manifest.csv; a report for every row")
async def upload(request: Request, route_id: int, principal: Principal = Depends(require_role("technician"))):
    ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
    # the ZIP goes to a temporary file past SPOOL_BYTES, never whole into memory (docs/security.md)
    if ctype in ("application/zip", "application/x-zip-compressed", "application/octet-stream"):
        data = tempfile.SpooledTemporaryFile(max_size=SPOOL_BYTES)  # noqa: SIM115 - closed below
        async for chunk in request.stream():
            data.write(chunk)  # chunks of the socket's size; past SPOOL_BYTES they go to disk
        data.seek(0)
    elif ctype == "multipart/form-data":
        form = await request.form()  # file parts are spooled by the form parser (1 MiB in memory)
        part = form.get("file")
        if part is None or isinstance(part, str):
            raise AppError("the form has no file part named 'file'; attach the ZIP as file", field="file",
                           status=422, code="invalid")
        data = part.file
        data.seek(0)
    else:
        raise AppError(f"content type {ctype!r} is not accepted; send the ZIP as application/zip or as the "
                       "'file' part of a multipart form", field="content-type", status=415,
                       code="unsupported_media_type")
    db, settings = request.app.state.db, request.app.state.settings

    def work():
        with db.read() as s:
            route = check_route(s, principal, route_id)
        return upload_route(db, route, data, uploader=principal.label, limits=Limits.from_settings(settings),
                            upload_limits=UploadLimits.from_settings(settings), site_scope=principal.site_id)

    try:
        report = await run_in_threadpool(work)
    finally:
        data.close()
    return JSONResponse(report, status_code=201 if report["accepted"] else 200)
