"""Suggested checks for a finding, by kind (common practice in machinery diagnostics, no source)."""

from __future__ import annotations

CAUTIONS = (
    "This is condition monitoring, not a machine protection or trip system: it does not stop machines "
    "and must not be relied on to protect people or plant.",
    "Site rules, the machine manufacturer's instructions and local codes take precedence over these "
    "suggestions.",
    "Any work on the machine follows the site's lockout/tagout and permit-to-work rules and is done by "
    "qualified people.",
)


def _has(family: dict | None, key: str) -> bool:
    value = (family or {}).get(key)
    return isinstance(value, (int, float)) and value > 0


def suggested_checks(finding: dict, metric: str | None = None, *, data_quality: bool = False) -> list[str]:
    """Plain-language checks for a planner; the most specific first."""
    if data_quality:
        return [
            "Check the sensor mounting, cable and connector; repeat the measurement.",
            "Confirm the machine speed and load at the time of the reading before comparing it with others.",
        ]
    sub = finding.get("subharmonic") or {}
    klass = sub.get("class")
    family = sub.get("family") or {}
    growth = finding.get("growth") or {}
    out: list[str] = []
    if klass == "half-order":
        if _has(family, "1.5X") or _has(family, "2.5X"):
            out.append("Half-order with 1.5X/2.5X lines: check for rub (seals, guards, couplings) and for "
                       "mechanical looseness (hold-down bolts, bearing fits, soft foot).")
        else:
            out.append("Exact half-order line: check for rub and looseness first (they give the same line).")
        out.append("If the machine runs near a structural mode at half the forcing frequency: check the "
                   "running speed against the unstable speed band and move out of it if operations allow.")
        if growth.get("state") == "growing":
            out.append("The line grows within the record (parametric-type onset): plan a follow-up reading "
                       "soon and avoid lingering at this speed and load.")
    elif klass == "sub-synchronous":
        out.append("Sub-synchronous line not locked to 0.5X (fluid-film whirl type): check bearing oil "
                   "supply temperature and pressure, bearing clearance and bearing load/alignment.")
    if metric == "overall_velocity":
        out.append("Overall level in ISO 20816 zone C or D: review against the machine's baseline and plan "
                   "an inspection; zone D levels are usually regarded as damaging.")
    if metric in ("trend_db_per_day", "time_to_limit_days"):
        out.append("Rising trend: shorten the reading interval on this point until the trend settles.")
    if not out:
        out.append("Compare with the previous readings of this point and repeat the measurement.")
    return out
