"""Likely causes ranked by the evidence the analysis has, each with why and what to do; priority and
by-when; the cautions every email and page keeps.

The causes and their checks are common practice in machinery diagnostics (no single source). The
weights are a house choice: they order the causes, they are not probabilities. Evidence read:

* the threshold margin and whether today's speed lies in the fitted unstable band (operating window);
* growth within the record and the trend across records;
* the family lines 1.5X / 2.5X that travel with a half-order line;
* the class of the line (exact 0.5X, or a whirl line at 0.38-0.48X);
* a recent step in speed (the onset of a parametric line often follows one);
* the overall level's ISO 20816 zone.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

CAUTIONS = (
    "This is condition monitoring, not a machine protection or trip system: it does not stop machines "
    "and must not be relied on to protect people or plant.",
    "Site rules, the machine manufacturer's instructions and local codes take precedence over these "
    "suggestions.",
    "Any work on the machine follows the site's lockout/tagout and permit-to-work rules and is done by "
    "qualified people.",
)

SPEED_CAUTION = ("Any change of speed stays within the manufacturer's limits and the site's operating "
                 "rules.")

# A speed step this recent counts as evidence for a speed-driven onset (house choice).
RECENT_SPEED_CHANGE_DAYS = 60


@dataclass(frozen=True, slots=True)
class Cause:
    """One likely cause: ``score`` orders them (higher first), ``why`` lists the evidence in words."""

    key: str
    title: str
    score: float
    why: tuple[str, ...]
    action: str

    def to_dict(self) -> dict:
        return {"key": self.key, "title": self.title, "score": self.score, "why": list(self.why),
                "action": self.action}


def _has(family: dict | None, key: str) -> bool:
    value = (family or {}).get(key)
    return isinstance(value, (int, float)) and value > 0


def _num(value) -> float | None:
    return float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else None


def _hz(pair) -> str:
    return f"{pair[0]:.2f} to {pair[1]:.2f} Hz"


def _growing(growth: dict) -> bool:
    ci = growth.get("ci95_per_s") or [None, None]
    rate = _num(growth.get("rate_per_s"))
    return (rate is not None and rate > 0 and isinstance(ci, (list, tuple)) and len(ci) == 2
            and _num(ci[0]) is not None and ci[0] > 0) or growth.get("state") == "growing"


def _recent_change(evidence: dict, at: dt.datetime | None) -> dict | None:
    change = (evidence or {}).get("speed_change")
    if not change or not change.get("t"):
        return None
    if at is None:
        return change
    when = dt.datetime.fromisoformat(change["t"])
    when = when if when.tzinfo else when.replace(tzinfo=dt.UTC)
    return change if (at - when).total_seconds() <= RECENT_SPEED_CHANGE_DAYS * 86400 else None


def speed_action(evidence: dict) -> str:
    """What to do about the speed, from the window conclusion (band, stable speeds, skip band)."""
    w = (evidence or {}).get("window") or {}
    band = w.get("band_hz")
    if not band:
        return ("Check the running speed against the unstable speed band on the operating-window page and "
                "move out of it if operations allow.")
    text = f"Move the forcing speed out of the unstable band {_hz(band)}"
    below, above = w.get("stable_below_hz"), w.get("stable_above_hz")
    if below is not None and above is not None:
        text += f": stable below {below:.2f} Hz or above {above:.2f} Hz"
    text += ", if operations allow."
    skip, skip_rpm = w.get("skip_hz"), w.get("skip_rpm")
    if skip:
        text += f" On a variable-speed drive, program {_hz(skip)}"
        if skip_rpm:
            text += f" ({skip_rpm[0]:.0f} to {skip_rpm[1]:.0f} r/min)"
        text += " as a skipped speed range."
    return text + " " + SPEED_CAUTION


def ranked_causes(finding: dict, metrics: dict, evidence: dict | None = None, *,
                  at: dt.datetime | None = None, rules: list[str] | tuple = ()) -> list[Cause]:
    """Likely causes, most supported first (see the module docstring for the evidence read)."""
    evidence = evidence or {}
    sub = finding.get("subharmonic") or {}
    klass = sub.get("class") if sub.get("detected") else None
    family = sub.get("family") or {}
    growth = finding.get("growth") or {}
    margin = _num((metrics or {}).get("threshold_margin"))
    window = evidence.get("window") or {}
    inside = window.get("inside")
    change = _recent_change(evidence, at)
    trend = _num((metrics or {}).get("trend_db_per_day"))
    causes: list[Cause] = []

    if klass == "half-order" or margin is not None:
        score, why = 0.0, []
        if margin is not None and margin < 0:
            score += 4
            why.append(f"the operating-window fit puts today's running point beyond the instability "
                       f"threshold (margin {100 * margin:.0f} %)")
        elif margin is not None and margin < 0.2:
            score += 2
            why.append(f"the running point is close to the instability threshold "
                       f"(margin {100 * margin:.0f} %)")
        if inside:
            score += 1
            why.append(f"today's speed {window.get('speed_hz', 0):.2f} Hz lies in the unstable band "
                       f"{_hz(window['band_hz'])}" if window.get("band_hz") else "today's speed lies in the "
                       "unstable band")
        if klass == "half-order":
            score += 1
            why.append("the line sits at exactly 0.5X")
        if _growing(growth):
            score += 1
            why.append("the line grows within the record (an instability, not a steady forced line)")
        if change is not None:
            score += 1
            why.append(f"the speed changed on {change['t'][:10]} ({change['from_hz']:.2f} → "
                       f"{change['to_hz']:.2f} Hz)")
        if trend is not None and trend > 0:
            score += 0.5
            why.append(f"the line has been rising across readings (at least {trend:.1f} dB/day)")
        if score > 0:
            causes.append(Cause("parametric", "Parametric instability at this speed", score, tuple(why),
                                speed_action(evidence)))

    if klass == "half-order":
        fam = _has(family, "1.5X") or _has(family, "2.5X")
        why = ["the line sits at exactly 0.5X, which rub and looseness also give"]
        if fam:
            why.append("1.5X/2.5X lines are present (common with rub and looseness, also with a strong "
                       "parametric line)")
        causes.append(Cause("rub-looseness", "Rub or mechanical looseness", 2.0 if fam else 1.0, tuple(why),
                            "Check for rub (seals, guards, couplings) and mechanical looseness (hold-down "
                            "bolts, bearing fits, soft foot)."))

    if klass == "sub-synchronous":
        order = _num(sub.get("order"))
        at_order = f" at {order:.2f}X" if order is not None else ""
        why = [f"the line{at_order} is below 0.5X and not locked to it (fluid-film whirl range 0.38-0.48X)"]
        score = 4.0
        if change is not None:
            why.append(f"the speed changed on {change['t'][:10]}")
        causes.append(Cause("whirl", "Fluid-film bearing whirl", score, tuple(why),
                            "Check bearing oil supply temperature and pressure, bearing clearance and "
                            "bearing load/alignment; plan a bearing inspection if the line persists."))

    zone = (finding.get("overall") or {}).get("zone")
    if zone in ("C", "D") or "overall_velocity" in rules:
        causes.append(Cause("overall", f"Overall level in ISO 20816 zone {zone or 'C/D'}",
                            2.5 if zone == "D" else 1.5,
                            (f"overall velocity r.m.s. is in zone {zone}" if zone else "overall level rule",),
                            "Review against the machine's baseline and plan an inspection; zone D levels are "
                            "usually regarded as damaging."))

    if not causes:
        causes.append(Cause("unclear", "No clear cause yet", 0.0, ("the evidence does not point one way",),
                            "Compare with the previous readings of this point and repeat the measurement."))
    causes.sort(key=lambda c: -c.score)
    return causes


PRIORITY_DAYS = {"danger": 2, "alert": 14}  # house choice: act within 2 days at danger, 14 at alert


def priority(level: str, metrics: dict, at: dt.datetime, forecast: dict | None = None) -> tuple[str, str]:
    """``(priority word, by-when ISO date)``: danger is "high" (2 days); an alert whose forecast reaches
    the danger level within 30 days is "medium" by half that time (at least 1 day); other alerts are
    "routine" (14 days). House choice, stated in docs/alarms.md."""
    if level == "danger":
        days, word = PRIORITY_DAYS["danger"], "high"
    else:
        left = _num((forecast or {}).get("days_to_limit"))
        if left is None:
            left = _num((metrics or {}).get("time_to_limit_days"))
        if left is not None and 0 < left <= 30:
            days, word = max(1.0, min(left / 2.0, PRIORITY_DAYS["alert"])), "medium"
        else:
            days, word = PRIORITY_DAYS["alert"], "routine"
    return word, (at + dt.timedelta(days=days)).strftime("%Y-%m-%d")


def suggested_checks(finding: dict, metric: str | None = None, *, data_quality: bool = False,
                     metrics: dict | None = None, evidence: dict | None = None,
                     at: dt.datetime | None = None) -> list[str]:
    """Plain-language checks for a planner, the best-supported cause first."""
    if data_quality:
        return [
            "Check the sensor mounting, cable and connector; repeat the measurement.",
            "Confirm the machine speed and load at the time of the reading before comparing it with others.",
        ]
    out = [c.action for c in ranked_causes(finding, metrics or {}, evidence, at=at,
                                           rules=(metric,) if metric else ())]
    if metric in ("trend_db_per_day", "time_to_limit_days"):
        out.append("Rising trend: shorten the reading interval on this point until the trend settles.")
    return out
