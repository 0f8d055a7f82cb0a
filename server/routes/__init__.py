"""API routers, found automatically: every module here that defines ``router`` (an APIRouter) is
included by ``create_app``. Add a module; never edit this file to register it."""

from __future__ import annotations

import importlib
import pkgutil

from fastapi import APIRouter


def discover() -> list[APIRouter]:
    routers = []
    for info in sorted(pkgutil.iter_modules(__path__), key=lambda m: m.name):
        module = importlib.import_module(f"{__name__}.{info.name}")
        router = getattr(module, "router", None)
        if isinstance(router, APIRouter):
            routers.append(router)
    return routers
