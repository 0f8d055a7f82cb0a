"""The operating-window answer: a point's readings in (forcing frequency, 1X amplitude) and the fitted
instability region from :mod:`analysis.window` when that fit is installed and the data constrain it.

No router here. The fit itself belongs to the physics part; this module only shapes its output for the
chart (region outline, unstable band at today's amplitude, margin) and says plainly when there is none.
"""

from __future__ import annotations

import datetime as dt
import inspect
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


def _call_fit(fit_fn, pts: list[dict]):
    """Call the physics fit with the arguments its signature asks for (by name)."""
    names = set(inspect.signature(fit_fn).parameters)
    cols = {"time_days": [_days(p["t"]) for p in pts], "speed_hz": [p["forcing_hz"] for p in pts],
            "forcing_hz": [p["forcing_hz"] for p in pts], "amplitude_1x": [p["one_x"] for p in pts],
            "one_x": [p["one_x"] for p in pts], "present": [p["present"] for p in pts],
            "growth_per_s": [p["growth_per_s"] for p in pts]}
    kwargs = {k: v for k, v in cols.items() if k in names}
    return fit_fn(**kwargs)


def _days(t: str) -> float:
    return dt.datetime.fromisoformat(t.replace("Z", "+00:00")).timestamp() / 86400.0


def fitted_window(pts: list[dict]) -> dict:
    try:
        from analysis import window as physics
    except ImportError:
        return {"status": "unavailable", "message": NO_FIT}
    fit_fn = getattr(physics, "fit_window", None) or getattr(physics, "fit_operating_window", None)
    if fit_fn is None:
        return {"status": "unavailable", "message": NO_FIT}
    try:
        result = _call_fit(fit_fn, pts)
    except (ValueError, TypeError) as exc:
        return {"status": "not_constrained", "message": f"the fit could not be made: {exc}"}
    d = result.to_dict() if hasattr(result, "to_dict") else dict(result)
    return {"status": d.get("status", "fit"), **d}


def window_answer(rows) -> dict:
    pts = readings(rows)
    today = pts[-1] if pts else None
    fit = fitted_window(pts) if len(pts) >= 2 else {"status": "not_enough_data",
                                                      "message": "fewer than two readings with 1X"}
    return {"readings": pts, "today": today, "fit": fit}
