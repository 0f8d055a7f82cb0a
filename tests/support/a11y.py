"""axe-core in the page: ``violations(page)`` runs the vendored axe-core (tests/support/axe/) in a
Playwright page and returns its serious and critical violations (WCAG 2.x A/AA rules and best practices,
as axe-core defines them)."""

from __future__ import annotations

from pathlib import Path

AXE = Path(__file__).resolve().parent / "axe" / "axe.min.js"
BLOCKING = ("serious", "critical")


def violations(page, *, impacts=BLOCKING) -> list[dict]:
    if not page.evaluate("() => typeof window.axe !== 'undefined'"):
        # evaluated over the DevTools protocol: the page's Content-Security-Policy (script-src 'self')
        # stays as it is and still blocks inline scripts of the page itself
        page.evaluate(AXE.read_text(encoding="utf-8") + "\n;true")
    result = page.evaluate("""async () => {
        const r = await axe.run(document, { resultTypes: ['violations'] });
        return r.violations.map(v => ({ id: v.id, impact: v.impact, help: v.help,
            nodes: v.nodes.slice(0, 5).map(n =>
                n.target.join(' ') + ' :: ' + (n.failureSummary || '').slice(0, 160)) }));
    }""")
    return [v for v in result if v["impact"] in impacts]


def describe(found: list[dict]) -> str:
    return "\n".join(f"{v['impact']} {v['id']}: {v['help']}\n    " + "\n    ".join(v["nodes"]) for v in found)
