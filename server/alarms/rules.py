"""Alarm rules as plain data: metrics read from an analysis result, and the default rule set.

Pure logic: no database, no HTTP. A rule watches one *metric* (a number taken from the stored
analysis JSON or from the point's history) and has two levels, ``alert`` and ``danger``. For
``direction="above"`` a reading is beyond a level when ``value >= level``; for ``"below"`` (time to
limit, threshold margin) when ``value <= level``.

Default levels
--------------
The overall-velocity rule uses the ISO 20816 evaluation-zone boundaries of the point's machine group
and support: alert on entering zone C (the B/C boundary), danger on entering zone D (the C/D
boundary). That stays within the usual operational-limit guidance (alarm not above 1.25 x B/C, trip
not above 1.25 x C/D; values from memory, to be checked against the standard). The half-order line
gets the A/B boundary as alert and the B/C boundary as danger: a single sub-synchronous line that on
its own would take a healthy machine out of zone A deserves a look, and one that alone fills zone C
is serious (house choice). The other defaults are house choices documented beside each rule.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

from analysis.record.severity import ZONE_LIMITS_MM_S, band_covers_standard
from analysis.results import RecordAnalysis

LEVELS = ("normal", "alert", "danger")
LEVEL_RANK = {name: i for i, name in enumerate(LEVELS)}
ZONE_RANK = {"A": 0, "B": 1, "C": 2, "D": 3}

# ISO 20816-3 / 10816-3 Annex A zone boundaries (velocity r.m.s., mm/s): one table, in analysis.severity.
ISO_ZONE_LIMITS_MM_S = ZONE_LIMITS_MM_S


@dataclass(frozen=True, slots=True)
class MetricInfo:
    """What a metric is, in words a planner reads, and its unit."""

    label: str
    unit: str
    direction: str = "above"


METRICS: dict[str, MetricInfo] = {
    "half_order_velocity": MetricInfo("half-order velocity r.m.s.", "mm/s r.m.s."),
    "half_order_amplitude": MetricInfo("half-order acceleration peak (record units)", ""),
    "half_order_ratio": MetricInfo("half-order / 1X ratio", ""),
    "growth_rate": MetricInfo("within-record growth rate", "1/s"),
    "trend_db_per_day": MetricInfo("half-order trend (at least, 95 % one-sided)", "dB/day"),
    "time_to_limit_days": MetricInfo("forecast time to the danger level (at most)", "days", "below"),
    "overall_velocity": MetricInfo("overall velocity r.m.s. (ISO 20816 zone)", "mm/s r.m.s."),
    "threshold_margin": MetricInfo("margin to the instability threshold", "", "below"),  # value_text: %
    "order_1x_velocity": MetricInfo("1X velocity r.m.s.", "mm/s r.m.s."),
    "order_2x_velocity": MetricInfo("2X velocity r.m.s.", "mm/s r.m.s."),
    "crest_factor": MetricInfo("crest factor", ""),
}


# Rules on the trend across records change slowly and are fitted to the same readings again and again,
# so consecutive values are not independent: k of n alone cannot stop them flapping. A level they
# reached is held for at least this long (measurement time) before it may drop (house choice: two days,
# several times the 6-hour bucket of the trend fit).
# The threshold margin reads the operating-window fit, refitted every few records, and today's 1X
# amplitude, which scatters from reading to reading: it flapped between alert and danger like the trend
# rules did, so it gets their dwell, 3 of 4 and the 50 % band too (house choice).
SLOW_RULES_DWELL_S = {"trend_db_per_day": 2 * 86400.0, "time_to_limit_days": 2 * 86400.0,
                      "threshold_margin": 2 * 86400.0}

# Rules about the subharmonic line itself: their label names the line by its class (a whirl line at
# 0.43X is not called half-order). "{line}" is filled by :func:`line_name`.
LINE_LABELS = {
    "half_order_velocity": "{line} velocity r.m.s.",
    "half_order_amplitude": "{line} acceleration peak (record units)",
    "half_order_ratio": "{line} / 1X ratio",
    "trend_db_per_day": "{line} trend (at least, 95 % one-sided)",
}


def value_text(metric: str, value) -> str:
    """A rule's value as a planner reads it, with its measure: the margin as a percentage everywhere
    ("-6 % (beyond the threshold)"), the ratio as "× 1X (peak / peak)", the others in plain numbers to
    3 significant digits with their unit."""
    if not _finite(value):
        return "n/a"
    if metric == "threshold_margin":
        text = f"{100.0 * value:.0f} %"
        return text + " (beyond the threshold)" if value < 0 else text
    if metric == "half_order_ratio":
        return f"{plain_number(value)} × 1X (peak / peak)"
    unit = METRICS[metric].unit if metric in METRICS else ""
    return f"{plain_number(value)} {unit}".strip()


def plain_number(value: float, digits: int = 3) -> str:
    """A number in plain positional form (never "3.82e-05") to ``digits`` significant digits; whole
    numbers from 10^digits up are rounded to units (the pages' HW.num does the same)."""
    a = abs(value)
    if a == 0:
        return "0"
    if a >= 10**digits:
        return str(round(value))
    places = max(0, digits - 1 - math.floor(math.log10(a)))
    text = f"{value:.{min(places, 20)}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


def line_name(line_class: str | None, order: float | None = None) -> str:
    """The line in the trade's words by its class: "half-order" (exactly 0.5X), "sub-synchronous whirl
    line (0.43X)"; another class "subharmonic line"."""
    if line_class == "half-order":
        return "half-order"
    if line_class == "sub-synchronous":
        at = f" ({order:.2f}X)" if _finite(order) else ""
        return f"sub-synchronous whirl line{at}"
    return "subharmonic line"


def rule_label(metric: str, line_class: str | None = None, order: float | None = None) -> str:
    """The rule's label for a planner, naming the line by its class when the rule is about the line."""
    template = LINE_LABELS.get(metric)
    if template is None or line_class is None:
        return METRICS[metric].label if metric in METRICS else metric
    return template.format(line=line_name(line_class, order))


@dataclass(frozen=True, slots=True)
class RuleSpec:
    """One alarm rule.

    ``alert``/``danger`` of ``None`` on a ``zone_based`` rule mean "take the ISO zone boundaries of
    the result". Persistence: a level is raised when at least ``k`` of the last ``n`` readings are
    beyond it. Hysteresis: the level clears when at least ``k`` of the last ``n`` readings are back
    inside the level moved by ``hysteresis`` (a fraction: 0.1 clears an "above" rule at 90 % of the
    level, a "below" rule at 110 %).
    """

    metric: str
    alert: float | None
    danger: float | None
    k: int = 2
    n: int = 3
    hysteresis: float = 0.10
    direction: str = "above"
    zone_based: bool = False
    enabled: bool = True
    id: int | None = None
    extra: dict = field(default_factory=dict)

    def validate(self) -> None:
        """Raise ``ValueError`` naming the field when the rule cannot work."""
        if self.metric not in METRICS:
            raise ValueError(f"metric: unknown metric {self.metric!r}; use one of {', '.join(METRICS)}")
        if self.direction not in ("above", "below"):
            raise ValueError("direction: use 'above' or 'below'")
        if not (1 <= self.k <= self.n <= 50):
            raise ValueError("k: persistence needs 1 <= k <= n <= 50")
        if not (0.0 <= self.hysteresis < 1.0):
            raise ValueError("hysteresis: a fraction from 0 to below 1, e.g. 0.1")
        if self.zone_based:
            return
        for name in ("alert", "danger"):
            value = getattr(self, name)
            if value is None or not math.isfinite(value):
                raise ValueError(f"{name}: a finite level is required")
        if self.direction == "above" and self.danger < self.alert:
            raise ValueError("danger: must be at or above the alert level for an 'above' rule")
        if self.direction == "below" and self.danger > self.alert:
            raise ValueError("danger: must be at or below the alert level for a 'below' rule")

    def levels(self, result: dict | None = None) -> tuple[float, float] | None:
        """``(alert, danger)`` for this reading; zone-based rules read the result's zone limits."""
        if not self.zone_based:
            return float(self.alert), float(self.danger)
        if not zone_graded(result or {}):
            return None  # the reading's band does not cover the standard's: no zone, no zone rule
        limits = zone_limits(result or {})
        if limits is None:
            return None
        return limits[1], limits[2]


def zone_graded(result: dict) -> bool:
    """Whether the reading's overall level may be graded against the ISO zones: its band covers the
    standard's (:func:`analysis.record.severity.band_covers_standard`). A result without a band (older
    forms, or a bare dict of levels) counts as graded, as it always did."""
    overall = (result.get("overall") or {}) if isinstance(result, dict) else {}
    band = overall.get("band_hz")
    forcing = (result.get("forcing") or {}).get("frequency_hz") if isinstance(result, dict) else None
    if not band or not forcing:
        return True
    return band_covers_standard(band, float(forcing))


def zone_limits(result: dict, *, group: int = 2, support: str = "rigid") -> tuple[float, float, float] | None:
    """ISO zone boundaries (A/B, B/C, C/D, velocity r.m.s. in mm/s) from the result, else the table for
    group/support. Reads results of any version (``zone_limits_rms_mm_s``, formerly ``zone_limits_mm_s``)."""
    overall = (result.get("overall") or {}) if isinstance(result, dict) else {}
    limits = overall.get("zone_limits_rms_mm_s", overall.get("zone_limits_mm_s"))
    if isinstance(limits, dict):
        limits = [limits.get(key) for key in ("A/B", "B/C", "C/D")]
    if isinstance(limits, (list, tuple)) and len(limits) == 3 and all(_finite(v) for v in limits):
        return float(limits[0]), float(limits[1]), float(limits[2])
    return ISO_ZONE_LIMITS_MM_S.get((group, support))


def default_rules(*, group: int = 2, support: str = "rigid") -> list[RuleSpec]:
    """The rule set every new measurement point gets."""
    ab, bc, _cd = ISO_ZONE_LIMITS_MM_S.get((group, support), ISO_ZONE_LIMITS_MM_S[(2, "rigid")])
    return [
        # Half-order line alone: A/B boundary alerts, B/C boundary is danger (see module docstring).
        RuleSpec("half_order_velocity", ab, bc),
        # Half-order against 1X: a quarter of 1X alerts, half of 1X is danger (house choice).
        RuleSpec("half_order_ratio", 0.25, 0.5),
        # Growth inside one record, counted only when its 95 % CI excludes zero (house choice).
        RuleSpec("growth_rate", 0.05, 0.5),
        # Trend across records: +1 dB/day alerts, +3 dB/day is danger (house choice). The slow rules
        # read the conservative end of the fit's interval, need 3 of 4 readings and clear only well
        # back (an alert at 1 dB/day below 0.5 dB/day, a 30-day forecast beyond 45 days), and hold a
        # level for SLOW_RULES_DWELL_S before it may drop.
        RuleSpec("trend_db_per_day", 1.0, 3.0, k=3, n=4, hysteresis=0.5),
        # Forecast to the half-order danger level: within 30 days alerts, within 7 days is danger.
        RuleSpec("time_to_limit_days", 30.0, 7.0, k=3, n=4, hysteresis=0.5, direction="below"),
        # Overall level against the ISO 20816 zones: C alerts, D is danger.
        RuleSpec("overall_velocity", None, None, zone_based=True),
        # Margin 1 - h/h_c from the operating-window fit: 20 % alerts, 5 % is danger (house choice).
        # Like the slow rules: 3 of 4, cleared only well back (alert at 30 %, danger at 7.5 %), and a
        # level held for SLOW_RULES_DWELL_S before it may drop.
        RuleSpec("threshold_margin", 0.20, 0.05, k=3, n=4, hysteresis=0.5, direction="below"),
    ]


def rules_in_force(rules, point_id: int) -> list:
    """The one rule-precedence rule: which of a point's and its asset's rules apply to the point.

    ``rules`` are any objects with ``metric``, ``point_id`` (``None`` for an asset rule) and
    ``is_default``. A point's own rule that an engineer edited wins; a default point rule yields to an
    asset rule; an asset rule applies to a metric the point does not set. Rules of other points are
    ignored. Disabled rules are returned too (the caller decides what "disabled" shows).
    """
    by_metric = {r.metric: r for r in rules if r.point_id is None}
    for r in rules:
        if r.point_id == point_id and (not r.is_default or r.metric not in by_metric):
            by_metric[r.metric] = r
    return list(by_metric.values())


def with_levels(rule: RuleSpec, **changes) -> RuleSpec:
    """A copy of ``rule`` with some fields changed (validated)."""
    new = replace(rule, **changes)
    new.validate()
    return new


def _finite(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _num(value) -> float | None:
    return float(value) if _finite(value) else None


def typed_result(result: dict | RecordAnalysis) -> RecordAnalysis:
    """The typed result of a stored dict (any version) or the result itself."""
    return result if isinstance(result, RecordAnalysis) else RecordAnalysis.from_dict(result)


def result_metrics(result: dict | RecordAnalysis) -> dict[str, float | None]:
    """Metrics that come straight from one analysis result (typed, or a stored dict of any version).

    ``None`` means "this reading says nothing about the metric" (it neither raises nor clears).
    Line velocities are compared in r.m.s. (``velocity_rms_mm_s``), the measure of the ISO zones.
    """
    r = typed_result(result)
    sub, one_x, two_x = r.subharmonic, r.orders.get("1X"), r.orders.get("2X")
    detected = bool(sub.detected)
    half_v = _num(sub.velocity_rms_mm_s) if detected else 0.0
    half_a = _num(sub.amplitude) if detected else 0.0
    ratio = None
    one_x_amp = None if one_x is None else _num(one_x.amplitude)
    if not detected:
        ratio = 0.0
    elif half_a is not None and one_x_amp and one_x_amp > 0:
        ratio = half_a / one_x_amp
    g = r.growth
    return {
        "half_order_velocity": half_v,
        "half_order_amplitude": half_a,
        "half_order_ratio": ratio,
        "growth_rate": significant_growth({"rate_per_s": g.rate_per_s, "ci95_per_s": list(g.ci95_per_s)}),
        "overall_velocity": _num(r.overall.velocity_rms_mm_s),
        "order_1x_velocity": None if one_x is None else _num(one_x.velocity_rms_mm_s),
        "order_2x_velocity": None if two_x is None else _num(two_x.velocity_rms_mm_s),
        "crest_factor": _num(r.waveform.crest_factor),
    }


def significant_growth(growth: dict) -> float | None:
    """The within-record growth rate when its 95 % CI excludes zero, 0.0 when it does not.

    A rate whose interval straddles zero is no evidence of growth, so it counts as a calm reading.
    """
    rate = _num(growth.get("rate_per_s"))
    if rate is None:
        return None
    ci = growth.get("ci95_per_s")
    if isinstance(ci, (list, tuple)) and len(ci) == 2 and _finite(ci[0]) and _finite(ci[1]):
        lo, hi = float(ci[0]), float(ci[1])
        if lo <= 0.0 <= hi:
            return 0.0
        return rate
    if _finite(ci):  # a half-width
        return rate if abs(rate) > float(ci) else 0.0
    return 0.0
