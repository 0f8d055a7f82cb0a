"""What one record's alarm evaluation reads and writes, as prebuilt Core statements.

The worker evaluates the rules of a point after every analysis, so this path is kept to one SELECT
and one UPDATE per record: :data:`_READ` joins the point, its asset, area and site, the point's
status row, its effective rules (the point's own and the asset's) and the state of each rule's
metric. A record that changes no level writes only the status row (history, speeds, persistence
windows, last metrics). State rows are written only when something in them changes (a level, the
rule that governs it, an inactive reason), and only the columns that changed, so an acknowledgement
or a shelving written meanwhile by the API is never overwritten with an older value.

On PostgreSQL the point row is first locked ``FOR NO KEY UPDATE`` by a statement of its own: two workers
that store records of the same point at once take turns instead of losing one another's window update
(ingest only needs the weaker key-share lock on the point, so it is not held up). The read runs after
the lock as a separate statement, so under READ COMMITTED it sees the status and state rows the other
worker committed while this one waited (a lock taken inside the joined read would re-check only the
point row and return the other tables as they were before the wait).
"""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass, field

from sqlalchemy import Text, and_, bindparam, insert, or_, select, type_coerce, update

from server.storage.tables import Area, Asset, Point, Site, utcnow

from .tables import AlarmPointStatus, AlarmRule, AlarmState

_P, _A, _AR, _S = Point.__table__, Asset.__table__, Area.__table__, Site.__table__
_ST, _R, _AS = AlarmPointStatus.__table__, AlarmRule.__table__, AlarmState.__table__

RULE_COLUMNS = ("id", "point_id", "asset_id", "metric", "alert_level", "danger_level", "direction",
                "zone_based", "persist_k", "persist_n", "hysteresis", "enabled", "is_default")
STATE_COLUMNS = ("metric", "id", "level", "rule_id", "inactive_reason", "acked_level", "shelved_level",
                 "shelved_until")
STATUS_JSON = ("speeds_hz", "history", "windows", "window_fit", "last_metrics")
# The status columns the evaluation writes. ``window_fit`` is not among them: the background refresh
# (margin.refresh_window_fits) owns it and may store a new fit while a record is being evaluated.
STATUS_WRITE = ("speeds_hz", "history", "windows", "last_metrics", "last_record_id", "data_quality_open",
                "data_quality_reason", "updated_at")


_LOCK_POINT = select(_P.c.id).where(_P.c.id == bindparam("pid")).with_for_update(key_share=True)


def _read_statement():
    # The status JSON is read as text and parsed once: the row repeats once per rule.
    stmt = (
        select(_P.c.id.label("p_id"), _P.c.name.label("p_name"), _P.c.asset_id.label("p_asset_id"),
               _A.c.name.label("a_name"), _A.c.nominal_speed_hz, _A.c.forcing_multiplier, _A.c.machine_group,
               _A.c.foundation, _AR.c.id.label("ar_id"), _AR.c.name.label("ar_name"), _S.c.id.label("s_id"),
               _S.c.name.label("s_name"), _ST.c.point_id.label("st_point_id"),
               *(type_coerce(_ST.c[name], Text).label(f"st_{name}") for name in STATUS_JSON),
               _ST.c.last_record_id.label("st_last_record_id"),
               _ST.c.data_quality_open.label("st_data_quality_open"),
               _ST.c.data_quality_reason.label("st_data_quality_reason"),
               *(_R.c[name].label(f"r_{name}") for name in RULE_COLUMNS),
               *(_AS.c[name].label(f"as_{name}") for name in STATE_COLUMNS))
        .select_from(
            _P.join(_A, _A.c.id == _P.c.asset_id).join(_AR, _AR.c.id == _A.c.area_id)
            .join(_S, _S.c.id == _AR.c.site_id).outerjoin(_ST, _ST.c.point_id == _P.c.id)
            .outerjoin(_R, or_(_R.c.point_id == _P.c.id,
                               and_(_R.c.point_id.is_(None), _R.c.asset_id == _P.c.asset_id)))
            .outerjoin(_AS, and_(_AS.c.point_id == _P.c.id, _AS.c.metric == _R.c.metric)))
        .where(_P.c.id == bindparam("pid"))
        .order_by(_R.c.id)
    )
    return stmt


_READ = _read_statement()
_UPDATE_STATUS = (update(_ST).where(_ST.c.point_id == bindparam("b_point_id"))
                  .values({name: bindparam(name, type_=_ST.c[name].type) for name in STATUS_WRITE}))
_UPDATE_HISTORY = (update(_ST).where(_ST.c.point_id == bindparam("b_point_id"))
                   .values(history=bindparam("history", type_=_ST.c.history.type)))
_INSERT_STATUS = insert(_ST)
_INSERT_STATE = insert(_AS)


@dataclass(slots=True)
class RuleRow:
    """An ``alarm_rules`` row with the attribute names of :class:`AlarmRule` (``rule_spec`` reads both)."""

    id: int
    point_id: int | None
    asset_id: int | None
    metric: str
    alert_level: float | None
    danger_level: float | None
    direction: str
    zone_based: bool
    persist_k: int
    persist_n: int
    hysteresis: float
    enabled: bool
    is_default: bool


@dataclass(slots=True)
class StateRow:
    """The columns of an ``alarm_states`` row the evaluation needs; :meth:`set` records what changed."""

    metric: str
    id: int | None = None
    level: str = "normal"
    rule_id: int | None = None
    inactive_reason: str | None = None
    acked_level: str | None = None
    shelved_level: str | None = None
    shelved_until: dt.datetime | None = None
    changes: dict = field(default_factory=dict)

    def set(self, name: str, value) -> None:
        if self.id is None or getattr(self, name, None) != value or name not in STATE_COLUMNS:
            self.changes[name] = value
        if name in STATE_COLUMNS:
            setattr(self, name, value)


@dataclass(slots=True)
class Status:
    """The point's ``alarm_point_status`` row (``exists`` is False until the first write)."""

    exists: bool
    speeds_hz: list
    history: list
    windows: dict
    window_fit: dict
    last_metrics: dict
    last_record_id: int | None
    data_quality_open: bool
    data_quality_reason: str | None


@dataclass(slots=True)
class PointData:
    point_id: int
    asset_id: int
    where: dict
    nominal_forcing_hz: float | None
    machine_group: int | None
    foundation: str | None
    status: Status
    rules: list[RuleRow]
    states: dict[str, StateRow]


def _json(value, empty):
    if value is None:
        return empty
    return json.loads(value) if isinstance(value, (str, bytes)) else value


_POS = {key: i for i, key in enumerate(_READ.selected_columns.keys())}
_RULE_POS = [_POS[f"r_{name}"] for name in RULE_COLUMNS]
_STATE_POS = [_POS[f"as_{name}"] for name in STATE_COLUMNS]
_R_ID, _AS_ID, _AS_METRIC = _POS["r_id"], _POS["as_id"], _POS["as_metric"]


def read_point(conn, point_id: int) -> PointData:
    """Everything one record's evaluation needs, in one query (raises if the point does not exist).

    Rows are read by position (precomputed), not by name: the row repeats once per rule."""
    if conn.dialect.name == "postgresql":
        conn.execute(_LOCK_POINT, {"pid": point_id})
    rows = conn.execute(_READ, {"pid": point_id}).all()
    if not rows:
        from sqlalchemy.exc import NoResultFound

        raise NoResultFound(f"point {point_id} not found")
    first = rows[0]
    status = Status(
        exists=first.st_point_id is not None, speeds_hz=_json(first.st_speeds_hz, []),
        history=_json(first.st_history, []), windows=_json(first.st_windows, {}),
        window_fit=_json(first.st_window_fit, {}), last_metrics=_json(first.st_last_metrics, {}),
        last_record_id=first.st_last_record_id, data_quality_open=bool(first.st_data_quality_open),
        data_quality_reason=first.st_data_quality_reason,
    )
    rules, states = [], {}
    for row in rows:
        if row[_R_ID] is None:
            continue
        rules.append(RuleRow(*[row[i] for i in _RULE_POS]))
        if row[_AS_ID] is not None and row[_AS_METRIC] not in states:
            states[row[_AS_METRIC]] = StateRow(*[row[i] for i in _STATE_POS])
    nominal = (first.nominal_speed_hz or 0) * (first.forcing_multiplier or 1.0) or None
    where = {"point_id": first.p_id, "point": first.p_name, "asset_id": first.p_asset_id,
             "asset": first.a_name, "area_id": first.ar_id, "area": first.ar_name,
             "site_id": first.s_id, "site": first.s_name}
    return PointData(first.p_id, first.p_asset_id, where, nominal, first.machine_group, first.foundation,
                     status, rules, states)


def effective(rules: list[RuleRow], point_id: int) -> list[RuleRow]:
    """Point rules, with asset rules for any metric the point does not set itself
    (:func:`server.alarms.rules.rules_in_force`)."""
    from .rules import rules_in_force

    return rules_in_force(rules, point_id)


def write_status(conn, point_id: int, status: Status, now: dt.datetime, *, history_only: bool = False,
                 updated_at: dt.datetime | None = None) -> None:
    """One UPDATE of the status row (an INSERT the first time)."""
    if status.exists and history_only:
        conn.execute(_UPDATE_HISTORY, {"b_point_id": point_id, "history": status.history})
        return
    values = {name: getattr(status, name) for name in STATUS_WRITE if name != "updated_at"}
    values["updated_at"] = updated_at or now
    if status.exists:
        conn.execute(_UPDATE_STATUS, {"b_point_id": point_id, **values})
    else:
        conn.execute(_INSERT_STATUS, {"point_id": point_id, "window_fit": status.window_fit, **values})
        status.exists = True


def write_states(conn, point: PointData, states: list[StateRow]) -> None:
    """Insert the new state rows (one executemany) and update the changed columns of the others."""
    fresh = [s for s in states if s.id is None]
    if fresh:
        now = utcnow()
        base = {"point_id": point.point_id, "asset_id": point.asset_id, "window": [], "since": now,
                "updated_at": now, "last_value": None, "last_record_id": None, "last_event_id": None}
        rows = [{**base, "metric": s.metric, "level": s.level, "rule_id": s.rule_id,
                 "inactive_reason": s.inactive_reason, **s.changes} for s in fresh]
        keys = set().union(*rows)  # one executemany needs the same keys in every row
        conn.execute(_INSERT_STATE, [{k: row.get(k) for k in keys} for row in rows])
    for s in states:
        if s.id is not None and s.changes:
            conn.execute(update(_AS).where(_AS.c.id == s.id).values(**s.changes))
        s.changes = {}
