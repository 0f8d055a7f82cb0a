"""Asset registry: the tree with latest state per point, and creating/changing sites to points."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request
from pydantic import BaseModel

from server.schemas import AreaIn, AssetIn, PointIn, SiteIn
from server.security import Principal, require_role
from server.services import assets
from server.storage import tree as tree_queries

router = APIRouter(prefix="/api/v1", tags=["assets"])
engineer = require_role("engineer")


@router.get("/tree", summary="Sites > areas > assets > points, with the latest state of each point")
def get_tree(request: Request, principal: Principal = Depends(require_role("viewer"))):
    with request.app.state.db.read() as s:
        return tree_queries.tree(s, principal.site_id)


def _create(request: Request, kind: str, body: BaseModel, principal: Principal):
    from fastapi.responses import JSONResponse

    return JSONResponse(assets.create(request.app.state.db, kind, body.model_dump(), principal),
                        status_code=201)


def _update(request: Request, kind: str, row_id: int, body: BaseModel, principal: Principal):
    data = body.model_dump(exclude_unset=True)
    return assets.update(request.app.state.db, kind, row_id, data, principal)


@router.post("/sites", status_code=201, summary="Create a site (engineer)")
def create_site(request: Request, body: SiteIn, principal: Principal = Depends(engineer)):
    return _create(request, "site", body, principal)


@router.post("/areas", status_code=201, summary="Create an area of a site (engineer)")
def create_area(request: Request, body: AreaIn, principal: Principal = Depends(engineer)):
    return _create(request, "area", body, principal)


@router.post("/assets", status_code=201, summary="Create an asset (machine) in an area (engineer)")
def create_asset(request: Request, body: AssetIn, principal: Principal = Depends(engineer)):
    return _create(request, "asset", body, principal)


@router.put("/assets/{asset_id}", summary="Change an asset (engineer)")
def update_asset(request: Request, asset_id: int, body: AssetIn, principal: Principal = Depends(engineer)):
    return _update(request, "asset", asset_id, body, principal)


@router.post("/points", status_code=201, summary="Create a measurement point on an asset (engineer)")
def create_point(request: Request, body: PointIn, principal: Principal = Depends(engineer)):
    return _create(request, "point", body, principal)


@router.put("/points/{point_id}", summary="Change a measurement point (engineer)")
def update_point(request: Request, point_id: int, body: PointIn, principal: Principal = Depends(engineer)):
    return _update(request, "point", point_id, body, principal)
