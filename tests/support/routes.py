"""The (method, path) of every route an app serves: the role table and the site-isolation table are
generated from it (tests/ops/test_security.py, tests/server/test_site_isolation.py)."""

from __future__ import annotations


def app_routes(app) -> set[tuple[str, str]]:
    """(method, path) of every route the app serves, walking included routers."""

    def walk(routes):
        for r in routes:
            if hasattr(r, "original_router"):
                prefix = getattr(getattr(r, "include_context", None), "prefix", "") or ""
                yield from ((m, prefix + p) for m, p in walk(r.original_router.routes))
            elif hasattr(r, "methods") and r.methods:
                yield from ((m, r.path) for m in r.methods if m != "HEAD")

    return set(walk(app.routes))
