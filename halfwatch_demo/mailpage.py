"""The demo's "outgoing mail" page: the alert emails the local SMTP sink received, newest first.

Added to the app only by ``halfwatch demo`` (never in a deployment): ``/demo/mail`` lists the messages,
``/demo/mail/{name}`` shows one as plain text. The .eml files stay in the demo data folder.
"""

from __future__ import annotations

import html
from pathlib import Path

from fastapi import APIRouter
from fastapi.responses import HTMLResponse

from halfwatch_demo.mailsink import list_messages, message_text, shown

CAUTION = ("Simulated plant. halfwatch is condition monitoring, not a protection or trip system; site rules, "
           "the manufacturer's limits and local codes take precedence; work on machines follows the site's "
           "lockout and permit rules and is done by qualified people.")


def _page(title: str, body: str) -> HTMLResponse:
    return HTMLResponse(
        "<!doctype html><html lang=en><head><meta charset=utf-8>"
        f"<title>{html.escape(title)} - halfwatch demo</title>"
        "<style>body{font:15px/1.45 system-ui,sans-serif;margin:1.5rem;max-width:70rem}"
        "table{border-collapse:collapse;width:100%}td,th{border-bottom:1px solid #ccc;padding:.3rem .5rem;"
        "text-align:left}pre{white-space:pre-wrap;background:#f4f4f4;padding:1rem}"
        ".note{background:#fff4d6;padding:.5rem .8rem;border-left:4px solid #c98a00}</style></head><body>"
        f"<p class=note>{html.escape(CAUTION)}</p><p><a href='/'>dashboard</a> | "
        f"<a href='/demo/mail'>outgoing mail</a></p><h1>{html.escape(title)}</h1>{body}</body></html>")


def mail_router(folder: Path) -> APIRouter:
    router = APIRouter(tags=["demo"], include_in_schema=False)

    @router.get("/demo/mail", response_class=HTMLResponse)
    def outgoing_mail():
        rows = list_messages(folder)
        if not rows:
            return _page("Outgoing mail", "<p>No email yet.</p>")
        cells = "".join(
            f"<tr><td>{html.escape(m['date'])}</td><td>{html.escape(m['to'])}</td>"
            f"<td><a href='/demo/mail/{html.escape(m['name'])}'>{html.escape(m['subject'])}</a></td></tr>"
            for m in rows)
        return _page("Outgoing mail", f"<p>{len(rows)} message(s), also as .eml files in "
                     f"<code>{html.escape(shown(folder))}</code>.</p><table><tr><th>date</th><th>to</th>"
                     f"<th>subject</th></tr>{cells}</table>")

    @router.get("/demo/mail/{name}", response_class=HTMLResponse)
    def one_message(name: str):
        found = message_text(folder, name)
        if found is None:
            return HTMLResponse(_page("Not found", "<p>No such message.</p>").body, status_code=404)
        subject, text = found
        return _page(subject, f"<pre>{html.escape(text)}</pre>")

    return router
