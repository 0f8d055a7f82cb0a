"""Evaluate a stored analysis result against the point's rules, inside the worker's transaction.

Order of work for one record: data-quality check (a bad or off-speed record becomes a
``data-quality`` event and touches no machine state) -> metrics from the result and the point's
history (trend, forecast, threshold margin) -> one state step per rule -> an immutable event per
transition -> outbox rows for the subscribers, all in the caller's session (no commit here).

The slow rules (trend, forecast) read a fit over 6-hour buckets of the readings and the conservative
end of its interval (:mod:`.checks`), and hold a level for ``SLOW_RULES_DWELL_S`` of measurement time
before it may drop. Planners are emailed escalations and clears; a drop from danger to alert is in
the audit trail and on the dashboard, not in their inbox.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from types import SimpleNamespace

from sqlalchemy import select
from sqlalchemy.orm import Session

from analysis.result_compat import upgrade_result_dict
from analysis.results import RecordAnalysis
from server.storage.tables import Asset, Point, utcnow

from . import checks, margin
from .engine import Reading, step
from .evidence import evidence_for
from .incidents import after_transitions
from .notify import queue_for_events
from .pointstate import PointData, StateRow, effective, read_point, write_states, write_status
from .rules import (
    LEVEL_RANK,
    SLOW_RULES_DWELL_S,
    RuleSpec,
    default_rules,
    result_metrics,
    rule_label,
    rules_in_force,
    value_text,
)
from .tables import AlarmEvent, AlarmRule

HISTORY_LEN = 30
# Keys of the status row's ``windows`` JSON that are not rule windows: the trend buckets
# (checks.add_to_buckets) and, per slow rule, the measurement time its level was reached.
TREND_KEY, SINCE_KEY = "@trend", "@since"


def rule_spec(row: AlarmRule) -> RuleSpec:
    return RuleSpec(
        metric=row.metric, alert=row.alert_level, danger=row.danger_level, k=row.persist_k, n=row.persist_n,
        hysteresis=row.hysteresis, direction=row.direction, zone_based=row.zone_based, enabled=row.enabled,
        id=row.id,
    )


def ensure_default_rules(session: Session, point: Point, asset: Asset | None = None,
                         rows: list[AlarmRule] | None = None, *, persist: bool = True) -> list[AlarmRule]:
    """Create the default rules of a point that has none (the server may call this on point creation).

    With ``persist=False`` the defaults are returned without being added (for reads).
    """
    if rows is None:
        rows = list(session.scalars(select(AlarmRule).where(AlarmRule.point_id == point.id)))
    if rows:
        return rows
    asset = asset or point.asset
    for spec in default_rules(group=asset.machine_group or 2, support=asset.foundation or "rigid"):
        rows.append(
            AlarmRule(
                point_id=point.id, metric=spec.metric, alert_level=spec.alert, danger_level=spec.danger,
                direction=spec.direction, zone_based=spec.zone_based, persist_k=spec.k, persist_n=spec.n,
                hysteresis=spec.hysteresis, enabled=True, is_default=True, updated_by="defaults",
            )
        )
    if persist:
        session.add_all(rows)
        session.flush()
    return rows


def effective_rules(session: Session, point: Point, asset: Asset | None = None, *,
                    persist: bool = True) -> list[AlarmRule]:
    """Point rules, with asset rules for any metric the point does not set itself (one query)."""
    rows = session.scalars(select(AlarmRule).where(
        (AlarmRule.point_id == point.id)
        | ((AlarmRule.asset_id == point.asset_id) & AlarmRule.point_id.is_(None)))).all()
    point_rules = ensure_default_rules(session, point, asset, [r for r in rows if r.point_id == point.id],
                                       persist=persist)
    return rules_in_force([*point_rules, *(r for r in rows if r.point_id is None)], point.id)


def _result_data(result) -> dict:
    """The stored result as a version 2.0 dict (older results are read through the key map)."""
    data = getattr(result, "data", result)
    return upgrade_result_dict(json.loads(data) if isinstance(data, str) else dict(data))


def _measured_ts(record, result) -> float:
    ts = getattr(result, "measured_ts", None)
    if ts is not None:
        return float(ts)
    measured = getattr(record, "measured_at", None) or utcnow()
    return measured.timestamp()


def evaluate_result(
    session: Session, record, result, *, settings=None, now: dt.datetime | None = None
) -> list:
    """Run the rules for ``record``'s point on ``result``; returns the new :class:`AlarmEvent` rows.

    The states and the status row are read and written with Core statements on the session's
    connection (:mod:`.pointstate`); only new events and outbox rows go through the ORM."""
    now = now or utcnow()
    with session.no_autoflush:
        return _evaluate(session, record, result, settings, now)


def _point_rules(session: Session, conn, point: PointData) -> PointData:
    """The point's data with its default rules created if it has no rules of its own yet."""
    if any(r.point_id == point.point_id for r in point.rules):
        return point
    ensure_default_rules(session, SimpleNamespace(id=point.point_id),
                         SimpleNamespace(machine_group=point.machine_group, foundation=point.foundation), [])
    return read_point(conn, point.point_id)


def _evaluate(session: Session, record, result, settings, now: dt.datetime) -> list:
    conn = session.connection()
    point = read_point(conn, record.point_id)
    status, where = point.status, point.where
    data = _result_data(result)
    typed = RecordAnalysis.from_dict(data)
    common = {
        "point_id": point.point_id, "asset_id": point.asset_id, "area_id": where["area_id"],
        "site_id": where["site_id"], "record_id": record.id, "result_id": getattr(result, "id", None),
        "created_at": now,
    }
    problem = checks.data_quality_problem(
        typed, usual_speeds_hz=list(status.speeds_hz), nominal_forcing_hz=point.nominal_forcing_hz,
        speed_tolerance=getattr(settings, "alarm_speed_tolerance", 0.10),
        nominal_tolerance=getattr(settings, "alarm_nominal_speed_tolerance", 0.25),
    )
    if problem:
        newly_open = not status.data_quality_open
        status.data_quality_open, status.data_quality_reason = True, problem
        write_status(conn, point.point_id, status, now)
        event = AlarmEvent(kind="data-quality", summary=problem,
                           details={"where": where, "flags": list(typed.quality.flags)},
                           **common)
        session.add(event)
        session.flush()
        if newly_open:  # one email when a point's data turn bad, not one per bad record
            queue_for_events(session, [event], now=now)
        return [event]

    metrics = result_metrics(typed)
    ts = _measured_ts(record, result)
    old = list(status.history)
    if old and ts <= old[-1][0]:
        # A late record (route data uploaded out of order) or a re-analysis: it corrects the history
        # the trend is fitted to, but the levels follow the newest reading only.
        status.history = merge_history(old, ts, metrics["half_order_velocity"] or 0.0)
        write_status(conn, point.point_id, status, now, history_only=True)
        return []
    point = _point_rules(session, conn, point)
    rules = [r for r in effective(point.rules, point.point_id) if r.enabled]
    previous = dict(status.last_metrics)
    history = [*old, [ts, metrics["half_order_velocity"] or 0.0]][-HISTORY_LEN:]
    danger_of = {r.metric: r.danger_level for r in rules}
    windows = dict(status.windows)
    buckets = checks.add_to_buckets(windows.get(TREND_KEY, []), ts, metrics["half_order_velocity"] or 0.0)
    windows[TREND_KEY] = buckets
    since = dict(windows.get(SINCE_KEY, {}))
    trend_points = checks.trend_history(buckets)
    metrics["trend_db_per_day"], metrics["time_to_limit_days"] = checks.trend_and_forecast(
        trend_points, limit=danger_of.get("half_order_velocity"), conservative=True,
        min_points=checks.RULE_MIN_POINTS, min_span_days=checks.RULE_MIN_SPAN_DAYS,
    )
    metrics["threshold_margin"], margin_reason = margin.threshold_margin(status, typed)
    status.history = history
    status.speeds_hz = checks.remember_speed(list(status.speeds_hz), typed.forcing.frequency_hz)
    status.last_metrics = {k: v for k, v in metrics.items() if v is None or math.isfinite(v)}
    # the class of the line names the line-rules in the table, the digest and the subject (rules.rule_label)
    sub = typed.subharmonic
    status.last_metrics["line_class"] = sub.klass if sub.detected else None
    status.last_metrics["line_order"] = _finite_or_none(sub.order) if sub.detected else None
    status.last_record_id, status.data_quality_open = record.id, False

    events, touched = [], []
    forecast: dict | None = None  # the detailed forecast, computed once if anything changes
    evidence: dict | None = None  # speed, window conclusion, last speed change: once if anything changes
    for row in rules:
        spec = rule_spec(row)
        state = point.states.get(row.metric)
        if state is None:  # the first reading of this rule at this point: a new state row
            state = point.states[row.metric] = StateRow(metric=row.metric)
        touched.append(state)
        if state.rule_id != row.id:
            state.set("rule_id", row.id)
        value = metrics.get(row.metric)
        levels = spec.levels(data)
        if value is None or levels is None:
            reason = margin_reason if row.metric == "threshold_margin" else (
                "no zone graded: the reading's band does not reach the ISO 20816 band"
                if spec.zone_based and value is not None else "no reading")
            if state.inactive_reason != reason:
                state.set("inactive_reason", reason)
            continue
        if state.inactive_reason is not None:
            state.set("inactive_reason", None)
        window = [Reading.from_list(item) for item in windows.get(row.metric, [])]
        new_level, window, tr = step(spec, state.level, window, Reading(value, *levels))
        windows[row.metric] = [r.to_list() for r in window]
        if tr is not None and _dwelling(row.metric, tr, since, ts):
            tr = None  # a slow rule holds its level for a while before it may drop
        if tr is None:
            continue  # the state row is written only when its level changes
        if row.metric in SLOW_RULES_DWELL_S:
            since[row.metric] = ts
        if forecast is None:
            full = checks.detailed_forecast(trend_points, limit=danger_of.get("half_order_velocity"))
            forecast = {k: full.get(k) for k in checks.EMAIL_FORECAST_KEYS if k in full}
            evidence = evidence_for(session, point.point_id, typed, status.window_fit, now)
        for name, v in (("window", windows[row.metric]), ("last_value", value), ("last_record_id", record.id),
                        ("updated_at", now)):
            state.set(name, v)
        line = status.last_metrics
        label = rule_label(row.metric, line.get("line_class"), line.get("line_order"))
        summary = f"{label}: {tr.from_level} -> {tr.to_level} at {value_text(row.metric, value)}"
        event = AlarmEvent(
            kind="transition", metric=row.metric, rule_id=row.id, from_level=tr.from_level,
            to_level=tr.to_level, value=value, threshold=tr.level_value, summary=summary,
            details={"where": where, "metrics": status.last_metrics, "previous": previous,
                     "window": _window_summary(status.window_fit), "forecast": forecast,
                     "levels": list(levels), "finding": _finding(data), "direction": spec.direction,
                     "half_order_danger": danger_of.get("half_order_velocity"), "evidence": evidence,
                     "measured_at": dt.datetime.fromtimestamp(ts, dt.UTC).isoformat()},
            **common,
        )
        _apply_transition(state, new_level, now)
        events.append((event, state))
    if since:
        windows[SINCE_KEY] = since
    status.windows = windows
    if events:
        session.add_all([e for e, _ in events])
        session.flush()
        for event, state in events:
            state.set("last_event_id", event.id)
    write_states(conn, point, touched)
    write_status(conn, point.point_id, status, now)
    if events:  # one email per incident escalation, one when the incident clears (incidents.py)
        after_transitions(session, where, [e for e, _ in events], record_id=record.id, now=now)
    return [e for e, _ in events]


def _finite_or_none(value) -> float | None:
    return float(value) if isinstance(value, (int, float)) and math.isfinite(value) else None


def _dwelling(metric: str, tr, since: dict, ts: float) -> bool:
    """True while a slow rule's drop comes sooner than its dwell time after the level was reached."""
    dwell = SLOW_RULES_DWELL_S.get(metric)
    return bool(dwell) and not tr.escalation and ts - float(since.get(metric, -math.inf)) < dwell


def merge_history(history: list[list[float]], ts: float, value: float) -> list[list[float]]:
    """Put one reading into the time-ordered history (a reading at the same time is replaced)."""
    kept = [item for item in history if item[0] != ts]
    return sorted([*kept, [ts, value]], key=lambda item: item[0])[-HISTORY_LEN:]


def _apply_transition(state: StateRow, new_level: str, now: dt.datetime) -> None:
    """Move the state; a level above the acknowledged one re-alerts (the acknowledgement lapses)."""
    state.set("level", new_level)
    state.set("since", now)
    if state.acked_level is not None and (new_level == "normal"
                                          or LEVEL_RANK[new_level] > LEVEL_RANK[state.acked_level]):
        for name in ("acked_level", "acked_by", "acked_at", "ack_comment"):
            state.set(name, None)
    if (state.shelved_level is not None or state.shelved_until is not None) and (
        new_level == "normal" or LEVEL_RANK[new_level] > LEVEL_RANK[state.shelved_level or "normal"]
    ):
        for name in ("shelved_until", "shelve_reason", "shelved_by", "shelved_level"):
            state.set(name, None)


def _window_summary(fit: dict | None) -> dict | None:
    if not fit or fit.get("status") != "fit":
        return None
    return {"unstable_band_hz": fit.get("unstable_band_hz"), "fitted_at": fit.get("fitted_at")}


def _finding(data: dict) -> dict:
    """The parts of the result an email needs to describe the finding in the trade's words."""
    sub = data.get("subharmonic") or {}
    return {
        "subharmonic": {k: sub.get(k) for k in ("detected", "class", "frequency_hz", "order", "accel_peak",
                                                 "velocity_peak_mm_s", "velocity_rms_mm_s", "snr_db",
                                                 "family")},
        "growth": data.get("growth") or {},
        "overall": {k: (data.get("overall") or {}).get(k) for k in ("velocity_rms_mm_s", "zone",
                                                                     "zone_limits_rms_mm_s")},
        "forcing_hz": (data.get("forcing") or {}).get("frequency_hz"),
        "orders": data.get("orders") or {},
        "units": data.get("units"),
    }
