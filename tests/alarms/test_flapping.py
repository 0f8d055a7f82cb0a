"""The slow rules (trend dB/day, forecast time to limit) do not flap on a steady noisy line, and still
escalate in time on a growing one; a drop that does not clear emails nobody."""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pytest
from alarms.helpers import T0, make_result
from scipy import stats
from sqlalchemy import select, text

from server.alarms import checks, service
from server.alarms.engine import Transition
from server.alarms.evaluate import _dwelling
from server.alarms.tables import AlarmEvent, OutboxMessage

SLOW = ("trend_db_per_day", "time_to_limit_days")


def test_sen_interval_equals_scipy_theilslopes():
    # Lower and upper slope of the 90 % interval against scipy.stats.theilslopes (Sen 1968), with ties
    # in x (two readings at one time) and a stray reading.
    rng = np.random.default_rng(11)
    for n in (6, 13, 40):
        x = np.sort(rng.uniform(0.0, 10.0, n))
        x[2] = x[1]
        y = 0.3 + 0.05 * x + 0.2 * rng.standard_normal(n)
        y[n // 3] += 1.5
        ref = stats.theilslopes(y, x, alpha=0.90)
        lo, hi = checks.theil_sen_interval(list(x), list(y), 0.90)
        assert lo == pytest.approx(ref.low_slope, rel=1e-12)
        assert hi == pytest.approx(ref.high_slope, rel=1e-12)
        lo95, hi95 = checks.theil_sen_interval(list(x), list(y), 0.95)
        ref95 = stats.theilslopes(y, x, alpha=0.95)
        assert (lo95, hi95) == pytest.approx((ref95.low_slope, ref95.high_slope), rel=1e-12)


def test_buckets_pool_readings_as_a_geometric_mean():
    # The geometric mean is exp(mean ln A) (definition); a bucket with most readings lineless reads 0.
    buckets = []
    for ts, amp in ((100.0, 1.0), (200.0, 4.0), (21700.0, 2.0), (21800.0, 0.0), (21900.0, 0.0)):
        buckets = checks.add_to_buckets(buckets, ts, amp)
    assert [b[0] for b in buckets] == [0.0, 21600.0]
    first, second = checks.trend_history(buckets)
    assert first == pytest.approx([150.0, 2.0])  # sqrt(1 x 4)
    assert second[1] == 0.0
    many = []
    for i in range(100):
        many = checks.add_to_buckets(many, i * checks.BUCKET_S, 1.0)
    assert len(many) == checks.BUCKETS_KEPT and many[-1][0] == 99 * checks.BUCKET_S


def _hourly(feeder, plant, values):
    """Feed hourly readings; returns the transition events as (hour, metric, from, to)."""
    out = []
    for hour, v in enumerate(values):
        at = T0 + dt.timedelta(hours=hour)
        for _id, kind, metric, frm, to in feeder.feed(plant.point_id, make_result(half_v=float(v)), at=at):
            if kind == "transition":
                out.append((hour, metric, frm, to))
    return out


def test_noisy_steady_line_raises_at_most_one_change_per_rule(feeder, plant, migrated_db):
    # Invented: lognormal scatter of 20 % around 0.5 mm/s, hourly for 60 days. Before the fix the
    # trend and forecast rules changed level about 50 and 120 times on such a line (bench/alarm_flapping.py).
    service.create_subscription(migrated_db, {"email": "planner@example.test", "scope": "site",
                                              "scope_id": plant.site_id}, actor="admin1")
    rng = np.random.default_rng(2026)
    values = 0.5 * np.exp(0.2 * rng.standard_normal(60 * 24))
    got = _hourly(feeder, plant, values)
    for metric in {m for _h, m, _f, _t in got} | set(SLOW):
        assert len([g for g in got if g[1] == metric]) <= 1, (metric, got)
    with migrated_db.read() as s:
        assert s.scalar(select(text("count(*)")).select_from(OutboxMessage)) <= 2


def test_growing_line_still_escalates_before_it_reaches_danger(feeder, plant, migrated_db):
    # Invented: +1.5 dB/day from 0.3 mm/s with the same 20 % scatter; the half-order danger level is
    # 2.8 mm/s (ISO 20816 B/C, group 2 rigid, from memory), reached by the mean line near day 12.9.
    rng = np.random.default_rng(5)
    days = np.arange(14 * 24) / 24.0
    values = 0.3 * 10 ** (1.5 * days / 20.0) * np.exp(0.2 * rng.standard_normal(days.size))
    got = _hourly(feeder, plant, values)
    first = {}
    for hour, metric, _frm, to in got:
        first.setdefault((metric, to), hour / 24.0)
    crossing = math.log(2.8 / 0.3) / (1.5 / 20.0 * math.log(10.0))
    assert crossing == pytest.approx(12.9, abs=0.1)
    assert first[("trend_db_per_day", "alert")] <= 5.0  # 1 dB/day alert within days of the 3-day span
    assert first[("time_to_limit_days", "alert")] <= 5.0  # forecast within 30 days
    assert first[("time_to_limit_days", "danger")] < crossing - 2.0  # within 7 days, days ahead of it
    assert ("trend_db_per_day", "danger") not in first  # 1.5 dB/day is below the 3 dB/day danger level
    for metric in SLOW:  # a steady rise: the slow rules only go up
        assert all(to != "normal" for _h, m, _f, to in got if m == metric)
    with migrated_db.read() as s:
        events = s.scalars(select(AlarmEvent).where(AlarmEvent.metric == "time_to_limit_days")).all()
        assert [e.to_level for e in events] == ["alert", "danger"]


def test_slow_rules_dwell_and_drops_that_do_not_clear_are_not_mailed():
    drop = Transition("danger", "alert", 20.0, 9.0)
    clear = Transition("alert", "normal", 50.0, 45.0)
    up = Transition("normal", "alert", 20.0, 30.0)
    since = {"time_to_limit_days": 1000.0}
    day = 86400.0
    assert _dwelling("time_to_limit_days", drop, since, 1000.0 + 1.9 * day)  # held for two days
    assert not _dwelling("time_to_limit_days", drop, since, 1000.0 + 2.1 * day)
    assert not _dwelling("time_to_limit_days", up, since, 1000.0 + 60.0)  # escalations never wait
    assert not _dwelling("half_order_velocity", drop, since, 1000.0)  # fast rules do not dwell
    assert not _dwelling("trend_db_per_day", drop, since, 1000.0)  # no record of when: no hold
    assert _dwelling("threshold_margin", drop, {"threshold_margin": 1000.0}, 1000.0 + 1.9 * day)  # margin too
    assert not _dwelling("threshold_margin", clear, {"threshold_margin": 1000.0}, 1000.0 + 2.1 * day)
