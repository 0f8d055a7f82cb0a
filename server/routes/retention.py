"""A reading's retention state, and pinning it so its raw waveform is kept (engineers; audited)."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Body, Depends, Request
from pydantic import AfterValidator, BaseModel, Field

from server.names import _pydantic_check
from server.retention import pins
from server.security import Principal, require_role
from server.services.access import check_record

router = APIRouter(prefix="/api/v1", tags=["records"])


class PinIn(BaseModel):
    note: Annotated[str, Field(default="", max_length=500), AfterValidator(_pydantic_check)] = ""


@router.get("/records/{record_id}/retention",
            summary="Is the raw waveform kept (and which keep rule holds it) or removed by retention")
def get_retention(request: Request, record_id: int, principal: Principal = Depends(require_role("viewer"))):
    with request.app.state.db.read() as s:
        check_record(s, principal, record_id)
        return pins.state(s, request.app.state.settings, record_id)


@router.put("/records/{record_id}/pin", summary="Keep this reading's raw waveform at any age (engineer)")
def pin_record(request: Request, record_id: int, body: PinIn | None = Body(None),
               principal: Principal = Depends(require_role("engineer"))):
    with request.app.state.db.read() as s:
        check_record(s, principal, record_id)
    return pins.pin(request.app.state.db, record_id, actor=principal.name, note=body.note if body else "")


@router.delete("/records/{record_id}/pin", summary="Let the retention rules decide again (engineer)")
def unpin_record(request: Request, record_id: int, principal: Principal = Depends(require_role("engineer"))):
    with request.app.state.db.read() as s:
        check_record(s, principal, record_id)
    return pins.unpin(request.app.state.db, record_id, actor=principal.name)
