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
            routers.append(with_answer_models(router))
    return routers


def with_answer_models(router: APIRouter) -> APIRouter:
    """Give every JSON operation that declares no response model the common envelope
    (:class:`server.answers.OkAnswer`), so ``/openapi.json`` documents each success answer."""
    from fastapi.responses import JSONResponse
    from fastapi.routing import APIRoute

    from server.answers import OkAnswer

    keep = ("path", "endpoint", "status_code", "tags", "dependencies", "summary", "description",
            "response_description", "responses", "deprecated", "name", "methods", "operation_id",
            "include_in_schema", "response_class", "callbacks", "openapi_extra")
    for i, route in enumerate(router.routes):
        if (not isinstance(route, APIRoute) or route.response_model is not None
                or not route.include_in_schema):
            continue
        response_class = getattr(route.response_class, "value", route.response_class)
        if not (isinstance(response_class, type) and issubclass(response_class, JSONResponse)):
            continue
        kwargs = {k: getattr(route, k) for k in keep}
        kwargs["response_class"] = response_class
        router.routes[i] = APIRoute(response_model=OkAnswer,
                                    dependency_overrides_provider=route.dependency_overrides_provider,
                                    generate_unique_id_function=route.generate_unique_id_function, **kwargs)
    return router
