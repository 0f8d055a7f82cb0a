"""Evaluate a stored analysis result against the point's rules, inside the worker's transaction.

Order of work for one record: data-quality check (a bad or off-speed record becomes a
``data-quality`` event and touches no machine state) -> metrics from the result and the point's
history (trend, forecast, threshold margin) -> one state step per rule -> an immutable event per
transition -> outbox rows for the subscribers, all in the caller's session (no commit here).
"""

from __future__ import annotations

import datetime as dt
import json
import math

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.storage.tables import Area, Asset, Point, Site, utcnow

from . import checks, margin
from .engine import Reading, step
from .notify import queue_for_events
from .rules import LEVEL_RANK, METRICS, RuleSpec, default_rules, result_metrics
from .tables import AlarmEvent, AlarmPointStatus, AlarmRule, AlarmState

HISTORY_LEN = 30


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
    by_metric = {r.metric: r for r in rows if r.point_id is None}
    # A point's own rule that an engineer edited wins; a default point rule yields to an asset rule.
    for r in point_rules:
        if not r.is_default or r.metric not in by_metric:
            by_metric[r.metric] = r
    return list(by_metric.values())


def _result_data(result) -> dict:
    data = getattr(result, "data", result)
    return json.loads(data) if isinstance(data, str) else dict(data)


def _states(session: Session, point: Point, metrics: list[str]) -> dict[str, AlarmState]:
    """The point's states by metric (one query), creating the missing ones."""
    rows = session.scalars(select(AlarmState).where(AlarmState.point_id == point.id))
    states = {st.metric: st for st in rows}
    for metric in metrics:
        if metric not in states:
            states[metric] = AlarmState(point_id=point.id, asset_id=point.asset_id, metric=metric,
                                        level="normal", window=[])
            session.add(states[metric])
    return states


def _context(session: Session, point_id: int) -> tuple[Point, Asset, dict, AlarmPointStatus]:
    """The point, its asset, the names up to the site and the point's alarm status, in one query."""
    point, asset, area, site, status = session.execute(
        select(Point, Asset, Area, Site, AlarmPointStatus).join(Asset, Asset.id == Point.asset_id)
        .join(Area, Area.id == Asset.area_id).join(Site, Site.id == Area.site_id)
        .outerjoin(AlarmPointStatus, AlarmPointStatus.point_id == Point.id).where(Point.id == point_id)
    ).one()
    if status is None:
        status = AlarmPointStatus(point_id=point_id, speeds_hz=[], history=[], windows={}, window_fit={},
                                  last_metrics={})
        session.add(status)
    return point, asset, {
        "point_id": point.id, "point": point.name, "asset_id": asset.id, "asset": asset.name,
        "area_id": area.id, "area": area.name, "site_id": site.id, "site": site.name,
    }, status


def _measured_ts(record, result) -> float:
    ts = getattr(result, "measured_ts", None)
    if ts is not None:
        return float(ts)
    measured = getattr(record, "measured_at", None) or utcnow()
    return measured.timestamp()


def evaluate_result(
    session: Session, record, result, *, settings=None, now: dt.datetime | None = None
) -> list:
    """Run the rules for ``record``'s point on ``result``; returns the new :class:`AlarmEvent` rows."""
    now = now or utcnow()
    with session.no_autoflush:
        return _evaluate(session, record, result, settings, now)


def _evaluate(session: Session, record, result, settings, now: dt.datetime) -> list:
    point, asset, where, status = _context(session, record.point_id)
    data = _result_data(result)
    nominal = (asset.nominal_speed_hz or 0) * (asset.forcing_multiplier or 1.0) or None
    common = {
        "point_id": point.id, "asset_id": asset.id, "area_id": where["area_id"], "site_id": where["site_id"],
        "record_id": record.id, "result_id": getattr(result, "id", None), "created_at": now,
    }
    problem = checks.data_quality_problem(
        data, usual_speeds_hz=list(status.speeds_hz or []), nominal_forcing_hz=nominal,
        speed_tolerance=getattr(settings, "alarm_speed_tolerance", 0.10),
        nominal_tolerance=getattr(settings, "alarm_nominal_speed_tolerance", 0.25),
    )
    if problem:
        newly_open = not status.data_quality_open
        status.data_quality_open, status.data_quality_reason, status.updated_at = True, problem, now
        event = AlarmEvent(kind="data-quality", summary=problem,
                           details={"where": where, "flags": (data.get("quality") or {}).get("flags", [])},
                           **common)
        session.add(event)
        session.flush()
        if newly_open:  # one email when a point's data turn bad, not one per bad record
            queue_for_events(session, [event], now=now)
        return [event]

    metrics = result_metrics(data)
    ts = _measured_ts(record, result)
    old = list(status.history or [])
    if old and ts <= old[-1][0]:
        # A late record (route data uploaded out of order) or a re-analysis: it corrects the history
        # the trend is fitted to, but the levels follow the newest reading only.
        status.history = merge_history(old, ts, metrics["half_order_velocity"] or 0.0)
        return []
    rules = [r for r in effective_rules(session, point, asset) if r.enabled]
    previous = dict(status.last_metrics or {})
    history = [*old, [ts, metrics["half_order_velocity"] or 0.0]][-HISTORY_LEN:]
    danger_of = {r.metric: r.danger_level for r in rules}
    metrics["trend_db_per_day"], metrics["time_to_limit_days"] = checks.trend_and_forecast(
        history, limit=danger_of.get("half_order_velocity")
    )
    metrics["threshold_margin"], margin_reason = margin.threshold_margin(status, data)
    status.history = history
    status.speeds_hz = checks.remember_speed(list(status.speeds_hz or []), (data.get("forcing") or {})
                                             .get("frequency_hz"))
    status.last_metrics = {k: v for k, v in metrics.items() if v is None or math.isfinite(v)}
    status.last_record_id, status.data_quality_open, status.updated_at = record.id, False, now

    events = []
    forecast: dict | None = None  # the detailed forecast, computed once if anything changes
    states = _states(session, point, [r.metric for r in rules])
    windows = dict(status.windows or {})
    for row in rules:
        spec = rule_spec(row)
        state = states[row.metric]
        if state.rule_id != row.id:
            state.rule_id = row.id
        value = metrics.get(row.metric)
        levels = spec.levels(data)
        if value is None or levels is None:
            reason = margin_reason if row.metric == "threshold_margin" else "no reading"
            if state.inactive_reason != reason:
                state.inactive_reason = reason
            continue
        if state.inactive_reason is not None:
            state.inactive_reason = None
        window = [Reading.from_list(item) for item in windows.get(row.metric, [])]
        new_level, window, tr = step(spec, state.level, window, Reading(value, *levels))
        windows[row.metric] = [r.to_list() for r in window]
        if tr is None:
            continue  # the state row is written only when its level changes
        if forecast is None:
            forecast = checks.detailed_forecast(history, limit=danger_of.get("half_order_velocity"))
        state.window = windows[row.metric]
        state.last_value, state.last_record_id, state.updated_at = value, record.id, now
        info = METRICS[row.metric]
        summary = f"{info.label}: {tr.from_level} -> {tr.to_level} at {value:.3g} {info.unit}".rstrip()
        event = AlarmEvent(
            kind="transition", metric=row.metric, rule_id=row.id, from_level=tr.from_level,
            to_level=tr.to_level, value=value, threshold=tr.level_value, summary=summary,
            details={"where": where, "metrics": status.last_metrics, "previous": previous,
                     "window": _window_summary(status.window_fit), "forecast": forecast,
                     "levels": list(levels), "finding": _finding(data), "direction": spec.direction,
                     "half_order_danger": danger_of.get("half_order_velocity")},
            **common,
        )
        session.add(event)
        _apply_transition(state, new_level, now)
        events.append((event, state))
    status.windows = windows
    session.flush()
    for event, state in events:
        state.last_event_id = event.id
    queue_for_events(session, [e for e, s in events if not _shelved(s, now)], now=now)
    return [e for e, _ in events]


def merge_history(history: list[list[float]], ts: float, value: float) -> list[list[float]]:
    """Put one reading into the time-ordered history (a reading at the same time is replaced)."""
    kept = [item for item in history if item[0] != ts]
    return sorted([*kept, [ts, value]], key=lambda item: item[0])[-HISTORY_LEN:]


def _apply_transition(state: AlarmState, new_level: str, now: dt.datetime) -> None:
    """Move the state; a level above the acknowledged one re-alerts (the acknowledgement lapses)."""
    state.level, state.since = new_level, now
    if new_level == "normal" or (state.acked_level and LEVEL_RANK[new_level] > LEVEL_RANK[state.acked_level]):
        state.acked_level = state.acked_by = state.acked_at = state.ack_comment = None
    if new_level == "normal" or (
        state.shelved_level and LEVEL_RANK[new_level] > LEVEL_RANK[state.shelved_level]
    ):
        state.shelved_until = state.shelve_reason = state.shelved_by = state.shelved_level = None


def _shelved(state: AlarmState, now: dt.datetime) -> bool:
    return state.shelved_until is not None and state.shelved_until > now


def _window_summary(fit: dict | None) -> dict | None:
    if not fit or fit.get("status") != "fit":
        return None
    return {"unstable_band_hz": fit.get("unstable_band_hz"), "fitted_at": fit.get("fitted_at")}


def _finding(data: dict) -> dict:
    """The parts of the result an email needs to describe the finding in the trade's words."""
    sub = data.get("subharmonic") or {}
    return {
        "subharmonic": {k: sub.get(k) for k in ("detected", "class", "frequency_hz", "order", "amplitude",
                                                 "velocity_mm_s", "snr_db", "family")},
        "growth": data.get("growth") or {},
        "overall": {k: (data.get("overall") or {}).get(k) for k in ("velocity_rms_mm_s", "zone",
                                                                     "zone_limits_mm_s")},
        "forcing_hz": (data.get("forcing") or {}).get("frequency_hz"),
        "orders": data.get("orders") or {},
        "units": data.get("units"),
    }
