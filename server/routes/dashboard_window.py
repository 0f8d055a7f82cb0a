"""The operating-window answer: a point's readings in (forcing frequency, 1X amplitude) and the fitted
instability region from :mod:`analysis.window` when that fit is installed and the data constrain it.

No router here. The fit itself belongs to the physics part; this module only shapes its output for the
chart (region outline, unstable band at today's amplitude, margin) and says plainly when there is none.
"""

from __future__ import annotations

import datetime as dt
import math

from server.storage.queries import iso

NO_FIT = "no operating-window fit is available for this point yet"


def _f(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def readings(rows) -> list[dict]:
    """Rows of (ts, forcing_hz, 1X amplitude, detected, class, growth, sub amplitude, record id)."""
    out = []
    for ts, f, a1, det, klass, growth, sub_a, rid in rows:
        f, a1 = _f(f), _f(a1)
        if f is None or a1 is None:
            continue
        half = bool(det) and klass == "half-order"
        out.append({"t": iso(dt.datetime.fromtimestamp(ts, dt.UTC)), "forcing_hz": f, "one_x": a1,
                    "present": half, "class": klass if det else "none", "growth_per_s": _f(growth),
                    "sub_amplitude": _f(sub_a), "record_id": rid})
    return out


def region(fit: dict, speeds: list[float], *, points: int = 121) -> dict | None:
    """The fitted tongue boundary: the 1X amplitude threshold over a speed grid (first-order theory,
    a_c(f) = 2 sqrt(((f - 2 f0) / f0)^2 + 4 zeta^2) / k, as analysis.window fits it)."""
    f0, zeta, k = fit.get("f0_hz"), fit.get("zeta"), fit.get("k_per_unit")
    if not all(isinstance(v, int | float) and math.isfinite(v) and v > 0 for v in (f0, zeta, k)):
        return None
    lo = min([*speeds, 2 * f0 * 0.85])
    hi = max([*speeds, 2 * f0 * 1.15])
    grid = [lo + (hi - lo) * i / (points - 1) for i in range(points)]
    amp = [2.0 * math.sqrt(((f - 2.0 * f0) / f0) ** 2 + 4.0 * zeta**2) / k for f in grid]
    return {"forcing_hz": grid, "amplitude_1x": amp}


def fitted_window(pts: list[dict]) -> dict:
    try:
        from analysis.window import fit_operating_window
    except ImportError:
        return {"status": "unavailable", "message": NO_FIT}
    today = pts[-1]
    speeds = [p["forcing_hz"] for p in pts]
    try:
        present = [1.0 if p["present"] else 0.0 for p in pts]
        result = fit_operating_window(speeds, [p["one_x"] for p in pts], present,
                                      growth_rate_per_s=[math.nan if p["growth_per_s"] is None
                                                         else p["growth_per_s"] for p in pts],
                                      today_speed_hz=today["forcing_hz"], today_amp_1x=today["one_x"])
    except ValueError as exc:
        return {"status": "not_constrained", "message": f"the fit could not be made: {exc}"}
    d = result.to_dict()
    d["region"] = region(d, speeds)
    if d.get("margin_pct_lo") is not None and d.get("margin_pct_hi") is not None:
        d["margin_ci"] = [d["margin_pct_lo"], d["margin_pct_hi"]]
    return d


def window_answer(rows) -> dict:
    pts = readings(rows)
    today = pts[-1] if pts else None
    fit = fitted_window(pts) if len(pts) >= 2 else {"status": "not_enough_data",
                                                      "message": "fewer than two readings with 1X"}
    return {"readings": pts, "today": today, "fit": fit}
