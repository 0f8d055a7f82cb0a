"""Email text and HTML: alarm transitions, data-quality notices, the daily digest, the test message.

Everything here is pure: it takes plain dicts (event snapshots, digest rows) and returns
``(subject, text, html)``. The HTML is escaped with :func:`html.escape` throughout.
"""

from __future__ import annotations

import datetime as dt
from html import escape

from .rules import LEVEL_RANK, line_name, rule_label, value_text
from .suggestions import CAUTIONS, priority, ranked_causes, suggested_checks

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
        klass = sub.get("class")
        kind = "half-order component" if klass == "half-order" else \
            "sub-synchronous whirl line" if klass == "sub-synchronous" else line_name(klass)
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
    text = f"{value_text('threshold_margin', margin)}: beyond the instability threshold" if margin < 0 else \
        f"{value_text('threshold_margin', margin)} below the instability threshold"
    band = (window or {}).get("unstable_band_hz")
    if band:
        text += f"; unstable forcing band {band[0]:.2f} to {band[1]:.2f} Hz at today's 1X amplitude"
    return text


def _event_lines(event: dict) -> tuple[str, list[tuple[str, str]]]:
    """Headline and labelled facts of one event snapshot."""
    if event["kind"] == "data-quality":
        return f"Data-quality problem: {event['summary']}", []
    metric = event.get("metric") or ""
    sub = ((event.get("details") or {}).get("finding") or {}).get("subharmonic") or {}
    label = rule_label(metric, sub.get("class") if sub.get("detected") else None, sub.get("order"))
    headline = (f"{label}: {LEVEL_WORD[event['from_level']]} -> {LEVEL_WORD[event['to_level']]} "
                f"({value_text(metric, event.get('value'))}, "
                f"level {value_text(metric, event.get('threshold'))})")
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
        sub = finding.get("subharmonic") or {}
        klass = sub.get("class") if sub.get("detected") else None
        label = rule_label(first["metric"], klass, sub.get("order"))
        subject = f"[halfwatch] {_state_word(first)}: {where['asset']} / {where['point']} - {label}"
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


SIMULATED_NOTE = ("SIMULATED DATA: this email comes from the halfwatch demo; the plant, its readings and "
                  "this finding are invented.")


def _parse_time(text: str | None) -> dt.datetime | None:
    if not text:
        return None
    try:
        t = dt.datetime.fromisoformat(str(text).replace(" UTC", "").replace("Z", "+00:00"))
    except ValueError:
        return None
    return t if t.tzinfo else t.replace(tzinfo=dt.UTC)


def iso_minute(text: str | None) -> str:
    """An ISO time as "YYYY-MM-DD HH:MM UTC" (24-hour), or "n/a"."""
    t = _parse_time(text)
    return t.astimezone(dt.UTC).strftime("%Y-%m-%d %H:%M UTC") if t else "n/a"


def speed_facts(evidence: dict | None) -> list[tuple[str, str]]:
    """Today's speed against the unstable band, the stable speeds and the last speed change, in words."""
    ev = evidence or {}
    out = []
    w = ev.get("window") or {}
    speed = ev.get("speed_hz")
    per_rev = ev.get("forcing_per_rev") or 1.0
    if speed is not None:
        text = f"{speed:.2f} Hz forcing (1X)"
        if per_rev and abs(per_rev - 1.0) > 1e-9:
            text += f" = {speed / per_rev:.2f} Hz shaft ({60 * speed / per_rev:.0f} r/min; forcing is " \
                    f"{per_rev:g} x shaft speed)"
        else:
            text += f" ({60 * speed:.0f} r/min)"
        band = w.get("band_hz")
        if band:
            inside = w.get("inside")
            where = "inside" if inside else "outside" if inside is not None else "against"
            text += f"; {where} the unstable band {band[0]:.2f} to {band[1]:.2f} Hz at today's 1X amplitude"
        elif w:
            text += "; no unstable band at today's 1X amplitude"
        else:
            text += "; no operating-window conclusion yet (not enough readings across speeds)"
        out.append(("Today's speed", text))
    if w.get("band_hz"):
        below, above = w.get("stable_below_hz"), w.get("stable_above_hz")
        stable = []
        if below is not None:
            stable.append(f"below {below:.2f} Hz")
        if above is not None:
            stable.append(f"above {above:.2f} Hz")
        if stable:
            out.append(("Stable speeds", " or ".join(stable)))
        skip = w.get("skip_hz")
        if skip:
            rpm = w.get("skip_rpm")
            text = f"{skip[0]:.2f} to {skip[1]:.2f} Hz"
            if rpm:
                text += f" ({rpm[0]:.0f} to {rpm[1]:.0f} r/min)"
            if w.get("margin_pct") is not None:
                text += f", with {w['margin_pct']:.1f} % margin beyond the fit's 95 % interval"
            out.append(("Skipped speed range for a variable-speed drive", text))
    change = ev.get("speed_change")
    if change:
        out.append(("Last speed change", f"{iso_minute(change.get('t'))}: {change['from_hz']:.2f} -> "
                                         f"{change['to_hz']:.2f} Hz"))
    elif ev:
        out.append(("Last speed change", "none in the last 120 days"))
    return out


def _rule_lines(rules: list[dict]) -> list[str]:
    return [f"{LEVEL_WORD[r['level']]:<7} {r['point']}: {r['rule']} = "
            f"{value_text(r['metric'], r.get('value'))}"
            f" (since {iso_minute(r.get('since'))}{', shelved' if r.get('shelved') else ''}"
            f"{', acknowledged' if r.get('acknowledged') else ''})" for r in rules]


def incident_email(payload: dict, events: list[dict], *, base_url: str,
                   simulated: bool = False) -> tuple[str, str, str]:
    """One email for an incident escalation (every rule of the machine at its level) or its clear."""
    inc = payload["incident"]
    rules = payload.get("rules") or []
    first = events[0]
    details = first["details"]
    where = details["where"]
    finding = details.get("finding") or {}
    metrics = details.get("metrics") or {}
    evidence = details.get("evidence") or {}
    link = f"{base_url.rstrip('/')}/assets/{where['asset_id']}"
    alarms_link = f"{base_url.rstrip('/')}/alarms?asset_id={where['asset_id']}"
    tag = "[halfwatch] [simulated data]" if simulated else "[halfwatch]"
    measured = details.get("measured_at") or first.get("created_at")
    clear = inc["change"] == "clear"
    if clear:
        subject = f"{tag} CLEARED: {where['asset']} - every rule back to normal"
        lead = [f"Incident #{inc['id']} on {where['asset']} is over: every rule of the machine is back to "
                "normal.",
                f"Opened {iso_minute(inc.get('opened_at'))}; highest level {LEVEL_WORD[inc['peak_level']]}."]
        facts = [("Site / area", f"{where['site']} / {where['area']}"), ("Machine", where["asset"]),
                 ("Reading that cleared it", f"#{first.get('record_id')} measured {iso_minute(measured)}")]
        causes, checks, rule_lines = [], [], []
    else:
        leading = [r for r in rules if r["level"] == inc["change"]] or rules
        # the rule whose change raised the incident leads the subject
        leading.sort(key=lambda r: (r["metric"] != first.get("metric"), r["point"] != where["point"]))
        more = f" (+{len(rules) - 1} more)" if len(rules) > 1 else ""
        lead_rule = (f"{leading[0]['point']} - {leading[0]['rule']}" if leading
                     else f"{where['point']} - alarm")
        subject = f"{tag} {LEVEL_WORD[inc['change']]}: {where['asset']} / {lead_rule}{more}"
        at = _parse_time(measured) or dt.datetime.now(dt.UTC)
        word, by = priority(inc["change"], metrics, at, details.get("forecast"))
        ranked = ranked_causes(finding, metrics, evidence, at=at, rules=[r["metric"] for r in rules])
        best = ranked[0]
        lead = [f"Incident #{inc['id']} on {where['asset']}: {LEVEL_WORD[inc['change']]} "
                f"(opened {iso_minute(inc.get('opened_at'))}).",
                f"Priority: {word}; act by {by}.",
                f"Most likely cause: {best.title}, because {'; '.join(best.why)}.",
                f"Action: {best.action}"]
        causes = [f"{c.title}: {'; '.join(c.why)}. {c.action}" for c in ranked[1:]]
        checks = []
        if any(r["metric"] in ("trend_db_per_day", "time_to_limit_days") for r in rules):
            checks.append("Rising trend: shorten the reading interval on this point until the trend settles.")
        rule_lines = _rule_lines(rules)
        facts = [
            ("Site / area", f"{where['site']} / {where['area']}"),
            ("Machine / point", f"{where['asset']} / {where['point']}"),
            ("Reading", f"#{first.get('record_id')} measured {iso_minute(measured)}"),
            *speed_facts(evidence),
            ("Finding", describe_finding(finding)),
            ("Change since the last reading", change_since_last(metrics, details.get("previous") or {})),
            ("Forecast", forecast_text(metrics, details.get("half_order_danger"), details.get("forecast"))),
            ("Margin to the instability threshold", margin_text(metrics, details.get("window"))),
        ]
    headlines = [_event_lines(e)[0] for e in events]
    note = [SIMULATED_NOTE, ""] if simulated else []
    text = "\n".join(
        note + lead + [""]
        + (["Rules of this machine now:"] + [f"  {x}" for x in rule_lines] + [""] if rule_lines else [])
        + ["What changed with this reading:"] + [f"  - {h}" for h in headlines] + [""]
        + [f"{k}: {v}" for k, v in facts]
        + (["", "Other possible causes:"] + [f"  - {c}" for c in causes] if causes else [])
        + (["", "Also:"] + [f"  - {c}" for c in checks] if checks else [])
        + ["", f"Machine page: {link}", f"Alarms of this machine: {alarms_link}", "", "Cautions:"]
        + [f"  - {c}" for c in CAUTIONS]
    ) + "\n"
    html = (
        "<html><body>"
        + (f"<p><strong>{escape(SIMULATED_NOTE)}</strong></p>" if simulated else "")
        + f"<h2>{escape(subject)}</h2>" + "".join(f"<p>{escape(x)}</p>" for x in lead)
        + ("<h3>Rules of this machine now</h3><ul>" + "".join(f"<li>{escape(x)}</li>" for x in rule_lines)
           + "</ul>" if rule_lines else "")
        + "<h3>What changed with this reading</h3><ul>" + "".join(f"<li>{escape(h)}</li>" for h in headlines)
        + "</ul><table>"
        + "".join(f"<tr><th align='left'>{escape(k)}</th><td>{escape(str(v))}</td></tr>" for k, v in facts)
        + "</table>"
        + ("<h3>Other possible causes</h3><ul>" + "".join(f"<li>{escape(c)}</li>" for c in causes) + "</ul>"
           if causes else "")
        + ("<h3>Also</h3><ul>" + "".join(f"<li>{escape(c)}</li>" for c in checks) + "</ul>" if checks else "")
        + f"<p><a href=\"{escape(link)}\">Open the machine page</a> · "
          f"<a href=\"{escape(alarms_link)}\">Alarms of this machine</a></p><h3>Cautions</h3><ul>"
        + "".join(f"<li>{escape(c)}</li>" for c in CAUTIONS) + "</ul></body></html>"
    )
    return subject, text, html


DIGEST_COLUMNS = ("Severity", "Point", "Rule", "Value", "Since", "Status")


def _digest_cells(r: dict) -> tuple:
    return (LEVEL_WORD[r["level"]], r["point"], r["rule"], r["value"], r["since"], r["status"])


def digest_machines(rows: list[dict]) -> list[tuple[str, str, list[dict]]]:
    """``(machine, its worst level, its rows)`` in the order of the rows (grouped by machine, worst
    first: :func:`server.alarms.digest.by_machine`)."""
    out: list[tuple[str, str, list[dict]]] = []
    for r in rows:
        if not out or out[-1][0] != r["asset"]:
            out.append((r["asset"], r["level"], []))
        out[-1][2].append(r)
        if LEVEL_RANK[r["level"]] > LEVEL_RANK[out[-1][1]]:
            out[-1] = (out[-1][0], r["level"], out[-1][2])
    return out


def digest_email(rows: list[dict], *, scope_name: str, local_date: str, base_url: str,
                 changes_24h: int, simulated: bool = False) -> tuple[str, str, str]:
    """The daily list of open alarms grouped by machine, the worst machine first."""
    machines = digest_machines(rows)
    n_danger = sum(level == "danger" for _, level, _ in machines)
    tag = "[halfwatch] [simulated data]" if simulated else "[halfwatch]"
    subject = (f"{tag} daily digest {local_date} for {scope_name}: {len(machines)} machine(s) in alarm, "
               f"{n_danger} in danger ({len(rows)} rule(s))")
    table = [_digest_cells(r) for r in rows]
    widths = [max(len(str(c)) for c in col) for col in zip(DIGEST_COLUMNS, *table, strict=False)]

    def line(cells) -> str:
        return "  ".join(str(c).ljust(w) for c, w in zip(cells, widths, strict=True)).rstrip()

    body: list[str] = []
    for name, level, items in machines:
        body += ["", f"{LEVEL_WORD[level]}: {name} ({len(items)} rule(s))", "  " + line(DIGEST_COLUMNS)]
        body += ["  " + line(_digest_cells(r)) for r in items]
    note = [SIMULATED_NOTE, ""] if simulated else []
    text = "\n".join(
        note + [f"Open alarms for {scope_name} on {local_date}, by machine, worst first "
                f"(transitions in the last 24 h: {changes_24h})"]
        + (body if rows else ["", "No open alarms."])
        + ["", f"Dashboard: {base_url.rstrip('/')}/", "", "Cautions:"] + [f"  - {c}" for c in CAUTIONS]
    ) + "\n"
    head = "".join(f"<th align='left'>{escape(c)}</th>" for c in DIGEST_COLUMNS)
    parts = []
    for name, level, items in machines:
        parts.append(f"<h3>{escape(LEVEL_WORD[level])}: {escape(name)}</h3><table><tr>{head}</tr>"
                     + "".join("<tr>" + "".join(f"<td>{escape(str(c))}</td>" for c in _digest_cells(r))
                               + "</tr>" for r in items)
                     + "</table>")
    html = (
        "<html><body>" + (f"<p><strong>{escape(SIMULATED_NOTE)}</strong></p>" if simulated else "")
        + f"<h2>{escape(subject)}</h2><p>Transitions in the last 24 h: {changes_24h}</p>"
        + ("".join(parts) or "<p>No open alarms.</p>")
        + f"<p><a href=\"{escape(base_url.rstrip('/'))}/\">Open the dashboard</a></p><h3>Cautions</h3><ul>"
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
