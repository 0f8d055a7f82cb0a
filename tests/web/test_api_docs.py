"""/docs renders the API operations offline in real headless Chromium, under the server's own CSP.

Swagger UI comes from the installed swagger-ui-py package; the browser may reach nothing but the
test server (its host-resolver rule maps every other name to nothing), and any request elsewhere or any
Content-Security-Policy refusal fails the test.
"""

from __future__ import annotations

import pytest

pytestmark = pytest.mark.browser


def test_docs_page_renders_every_operation_offline(browser, site):
    ctx = browser.new_context(viewport={"width": 1280, "height": 900})
    page = ctx.new_page()
    problems, elsewhere = [], []
    page.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: problems.append(str(e)))
    page.on("request", lambda r: None if r.url.startswith(site.base) else elsewhere.append(r.url))
    try:
        r = page.goto(f"{site.base}/docs")
        assert r.status == 200
        assert "script-src 'self'" in r.headers["content-security-policy"]
        try:
            page.wait_for_selector(".opblock", timeout=20_000)
        except Exception:
            raise AssertionError((problems, elsewhere, page.inner_text("body")[:1500])) from None
        paths = page.locator(".opblock-summary-path").all_inner_texts()
        spec = page.evaluate("fetch('/openapi.json').then((r) => r.json())")
        n_ops = sum(len(ops) for ops in spec["paths"].values())
        assert len(paths) == n_ops and n_ops > 30  # every operation of the schema is on the page
        assert any("/api/v1/dashboard/points/{point_id}/series" in p.replace("\u200b", "") for p in paths)
        assert page.locator(".info .title").inner_text().startswith("halfwatch")
        assert elsewhere == [] and problems == [], (elsewhere, problems)
    finally:
        ctx.close()


def test_docs_assets_are_a_fixed_list(client):
    assert client.get("/docs/assets/swagger-ui-bundle.js").status_code == 200
    r = client.get("/docs/assets/index.html")  # in the package, but not on the list
    assert r.status_code == 404 and r.json()["error"]["field"] == "name"
    assert client.get("/docs/assets/..%2F..%2F__init__.py").status_code == 404
