"""Email text and HTML: alarm transitions, data-quality notices, the daily digest, the test message.

Everything here is pure: it takes plain dicts (event snapshots, digest rows) and returns
``(subject, text, html)``. The HTML is escaped with :func:`html.escape` throughout.
"""

from __future__ import annotations

from html import escape

from .rules import METRICS
from .suggestions import CAUTIONS, suggested_checks

LEVEL_WORD = {"normal": "normal", "alert": "ALERT", "danger": "DANGER"}


def _f(value, digits: int = 3) -> str:
    if value is None:
        return "n/a"
    return f"{value:.{digits}g}"


def describe_finding(finding: dict) -> str:
    """E.g. "half-order component at 14.8 Hz (0.50X), 3.2 mm/s, growing 0.9 /s; zone C"."""
    sub = finding.get("subharmonic") or {}
    parts = []
    if sub.get("detected"):
        kind = "half-order component" if sub.get("class") == "half-order" else "sub-synchronous component"
        text = f"{kind} at {_f(sub.get('frequency_hz'))} Hz"
        if sub.get("order") is not None:
            text += f" ({sub['order']:.2f}X)"
        rms = sub.get("velocity_rms_mm_s")
        if rms is None and sub.get("velocity_mm_s") is not None:  # events before revision 0005: a sine peak
            rms = sub["velocity_mm_s"] / 2 ** 0.5
        if rms is not None:
            text += f", {rms:.2g} mm/s r.m.s."
        growth = finding.get("growth") or {}
        ci = growth.get("ci95_per_s") or [None, None]
        rate = growth.get("rate_per_s")
        if rate is not None and ci[0] is not None and ci[1] is not None and not (ci[0] <= 0 <= ci[1]):
            text += f", {'growing' if rate > 0 else 'decaying'} {abs(rate):.2g} /s"
        parts.append(text)
    else:
        parts.append("no subharmonic line detected")
    overall = finding.get("overall") or {}
    if overall.get("zone"):
        parts.append(f"zone {overall['zone']} ({_f(overall.get('velocity_rms_mm_s'))} mm/s r.m.s. overall)")
    return "; ".join(parts)


def change_since_last(metrics: dict, previous: dict) -> str:
    if not previous:
        return "first reading evaluated on this point"
    out = []
    for key, label in (("half_order_velocity", "half-order"), ("overall_velocity", "overall")):
        now, before = metrics.get(key), previous.get(key)
        if now is None or before is None:
            continue
        text = f"{label} {before:.2g} -> {now:.2g} mm/s r.m.s."
        if before > 0:
            text += f" ({(now - before) / before:+.0%})"
        out.append(text)
    return "; ".join(out) or "no comparable previous reading"


def forecast_text(metrics: dict, danger: float | None, detailed: dict | None = None) -> str:
    limit = f" ({danger:.2g} mm/s r.m.s.)" if danger else ""
    d = detailed or {}
    if d.get("status") == "forecast" and d.get("days_to_limit") is not None:
        text = f"about {d['days_to_limit']:.0f} days to the danger level{limit}"
        if d.get("limit_iso"):  # the date the machine page's chart shows for the same readings
            text += f", around {d['limit_iso'][:16].replace('T', ' ')} UTC"
        lo, hi = d.get("days_to_limit_lo"), d.get("days_to_limit_hi")
        if lo is not None and hi is not None:
            text += f" (90 % interval {lo:.0f} to {hi:.0f} days)"
        elif lo is not None:
            text += f" (at least {lo:.0f} days; no upper bound)"
        return text + f", {d.get('model')} trend"
    if d.get("status") == "above_limit":
        return "already at or above the danger level"
    days = metrics.get("time_to_limit_days")
    if days is None:
        return (f"not enough readings yet for a forecast to the danger level{limit} "
                "(it needs readings over at least 3 days)")
    if days >= 9999:
        return "half-order level not rising: no forecast"
    if days <= 0:
        return "already at or above the danger level"
    return f"about {days:.0f} days to the danger level{limit} at the present trend"


def margin_text(metrics: dict, window: dict | None = None) -> str:
    margin = metrics.get("threshold_margin")
    if margin is None:
        return "not known (no operating-window fit for this point yet)"
    text = "beyond the instability threshold" if margin < 0 else \
        f"{margin:.0%} below the instability threshold"
    band = (window or {}).get("unstable_band_hz")
    if band:
        text += f"; unstable forcing band {band[0]:.2f} to {band[1]:.2f} Hz at today's 1X amplitude"
    return text


def _event_lines(event: dict) -> tuple[str, list[tuple[str, str]]]:
    """Headline and labelled facts of one event snapshot."""
    info = METRICS.get(event.get("metric") or "", None)
    label = info.label if info else (event.get("metric") or "")
    unit = f" {info.unit}" if info and info.unit else ""
    if event["kind"] == "data-quality":
        return f"Data-quality problem: {event['summary']}", []
    headline = (f"{label}: {LEVEL_WORD[event['from_level']]} -> {LEVEL_WORD[event['to_level']]} "
                f"({_f(event.get('value'))}{unit}, level {_f(event.get('threshold'))}{unit})")
    return headline, []


def _state_word(event: dict) -> str:
    order = ("normal", "alert", "danger")
    if order.index(event["to_level"]) > order.index(event["from_level"]):
        return LEVEL_WORD[event["to_level"]]
    return "CLEARED" if event["to_level"] == "normal" else f"down to {LEVEL_WORD[event['to_level']]}"


def alarm_email(events: list[dict], *, base_url: str) -> tuple[str, str, str]:
    """One email for the events of one record (the first is the most severe)."""
    first = events[0]
    where = first["details"]["where"]
    details = first["details"]
    finding = details.get("finding") or {}
    metrics = details.get("metrics") or {}
    link = f"{base_url.rstrip('/')}/assets/{where['asset_id']}"
    dq = first["kind"] == "data-quality"
    if dq:
        subject = f"[halfwatch] data quality: {where['asset']} / {where['point']}"
    else:
        subject = (f"[halfwatch] {_state_word(first)}: {where['asset']} / {where['point']} - "
                   f"{METRICS[first['metric']].label}")
    facts = [
        ("Site / area", f"{where['site']} / {where['area']}"),
        ("Asset", where["asset"]),
        ("Measurement point", where["point"]),
        ("Record", f"#{first.get('record_id')} at {first.get('created_at', '')}"),
    ]
    if not dq:
        facts += [
            ("Finding", describe_finding(finding)),
            ("Change since the last reading", change_since_last(metrics, details.get("previous") or {})),
            ("Forecast", forecast_text(metrics, details.get("half_order_danger"), details.get("forecast"))),
            ("Margin to the instability threshold", margin_text(metrics, details.get("window"))),
        ]
    headlines = [_event_lines(e)[0] for e in events]
    checks = suggested_checks(finding, first.get("metric"), data_quality=dq)
    text = "\n".join(
        ["What changed:"] + [f"  - {h}" for h in headlines] + [""]
        + [f"{k}: {v}" for k, v in facts] + ["", "Suggested checks:"] + [f"  - {c}" for c in checks]
        + ["", f"Asset page: {link}", "", "Cautions:"] + [f"  - {c}" for c in CAUTIONS]
    ) + "\n"
    html = (
        "<html><body>"
        f"<h2>{escape(subject)}</h2><h3>What changed</h3><ul>"
        + "".join(f"<li>{escape(h)}</li>" for h in headlines) + "</ul><table>"
        + "".join(f"<tr><th align='left'>{escape(k)}</th><td>{escape(str(v))}</td></tr>" for k, v in facts)
        + "</table><h3>Suggested checks</h3><ul>" + "".join(f"<li>{escape(c)}</li>" for c in checks)
        + f"</ul><p><a href=\"{escape(link)}\">Open the asset page</a></p><h3>Cautions</h3><ul>"
        + "".join(f"<li>{escape(c)}</li>" for c in CAUTIONS) + "</ul></body></html>"
    )
    return subject, text, html


DIGEST_COLUMNS = ("Severity", "Asset", "Point", "Rule", "Value", "Since", "Status")


def digest_email(rows: list[dict], *, scope_name: str, local_date: str, base_url: str,
                 changes_24h: int) -> tuple[str, str, str]:
    """The daily table of open alarms, danger first."""
    n_danger = sum(r["level"] == "danger" for r in rows)
    subject = (f"[halfwatch] daily digest {local_date} for {scope_name}: {len(rows)} open alarm(s), "
               f"{n_danger} danger")
    table = [
        (LEVEL_WORD[r["level"]], r["asset"], r["point"], r["rule"], r["value"], r["since"], r["status"])
        for r in rows
    ]
    widths = [max(len(str(c)) for c in col) for col in zip(DIGEST_COLUMNS, *table, strict=False)]

    def line(cells) -> str:
        return "  ".join(str(c).ljust(w) for c, w in zip(cells, widths, strict=True)).rstrip()

    text = "\n".join(
        [f"Open alarms for {scope_name} on {local_date} (transitions in the last 24 h: {changes_24h})", ""]
        + ([line(DIGEST_COLUMNS), line("-" * w for w in widths)] + [line(r) for r in table] if table
           else ["No open alarms."])
        + ["", f"Dashboard: {base_url.rstrip('/')}/", "", "Cautions:"] + [f"  - {c}" for c in CAUTIONS]
    ) + "\n"
    head = "".join(f"<th align='left'>{escape(c)}</th>" for c in DIGEST_COLUMNS)
    body = "".join(
        "<tr>" + "".join(f"<td>{escape(str(c))}</td>" for c in r) + "</tr>" for r in table
    ) or f"<tr><td colspan='{len(DIGEST_COLUMNS)}'>No open alarms.</td></tr>"
    html = (
        f"<html><body><h2>{escape(subject)}</h2><p>Transitions in the last 24 h: {changes_24h}</p>"
        f"<table><tr>{head}</tr>{body}</table>"
        f"<p><a href=\"{escape(base_url.rstrip('/'))}/\">Open the dashboard</a></p><h3>Cautions</h3><ul>"
        + "".join(f"<li>{escape(c)}</li>" for c in CAUTIONS) + "</ul></body></html>"
    )
    return subject, text, html


def smtp_test_email(*, base_url: str) -> tuple[str, str, str]:
    subject = "[halfwatch] test message"
    text = ("This is a test message from halfwatch: the SMTP settings work.\n\n"
            f"Dashboard: {base_url}\n\nCautions:\n" + "".join(f"  - {c}\n" for c in CAUTIONS))
    html = (f"<html><body><p>This is a test message from halfwatch: the SMTP settings work.</p>"
            f"<p><a href=\"{escape(base_url)}\">Dashboard</a></p><ul>"
            + "".join(f"<li>{escape(c)}</li>" for c in CAUTIONS) + "</ul></body></html>")
    return subject, text, html
