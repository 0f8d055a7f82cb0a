"""Compare an analysis result (``RecordAnalysis.to_dict()``) with a simulated record's truth.

Used by ``bench/accuracy.py`` and the accuracy tests. Pure dict arithmetic; the analysis itself is run by
the caller so this module does not depend on the pipeline.
"""

from __future__ import annotations

import math

from analysis.physics.stability import floquet_growth, threshold_floquet

__all__ = ["growth_case", "score"]


def growth_case(
    ratio: float,
    *,
    duration_s: float,
    forcing_hz: float,
    zeta: float = 0.01,
    onset_s: float = 1.6,
    floor_g: float = 0.002,
) -> dict:
    """Parameters of a ``parametric`` record that grows through the whole record after an early onset.

    The saturation level is set so the record ends at one third of it: the envelope is still within
    about 11 % of its exponential slope at the very end (Landau-type saturation,
    d ln A/dt = lambda (1 - A^2/A_sat^2)).
    """
    f0 = forcing_hz / 2.0
    lam = floquet_growth(
        f0, zeta, forcing_hz, ratio * threshold_floquet(f0, zeta, forcing_hz)
    ).growth_rate_per_s
    sat = 3.0 * floor_g * math.exp(lam * (duration_s - onset_s))
    return {"ratio": ratio, "zeta": zeta, "onset_s": onset_s, "floor_g": floor_g, "sub_amp_g": sat}


def score(truth: dict, result: dict) -> dict:
    """Per-record comparison: detection, class, and the errors of frequency, amplitude and growth rate."""
    sub_t = truth["subharmonic"]
    sub_r = result.get("subharmonic") or {}
    growth = result.get("growth") or {}
    detected = bool(sub_r.get("detected"))
    out = {
        "kind": truth["kind"],
        "truth_class": sub_t["class"],
        "class": sub_r.get("class") if detected else "none",
        "detected": detected,
        "present": bool(sub_t["present"]),
    }
    out["class_ok"] = out["class"] == sub_t["class"]
    out["precursor"] = bool(sub_r.get("precursor"))  # a noise-excited bump reported instead of a line
    out["spectrum"] = sub_r.get("spectrum")
    f_t, f_r = sub_t.get("frequency_hz"), sub_r.get("frequency_hz")
    out["freq_err_hz"] = f_r - f_t if detected and f_t is not None and f_r is not None else None
    a_t, a_r = sub_t.get("amplitude"), sub_r.get("accel_peak", sub_r.get("amplitude"))  # truth, result
    steady = sub_t.get("growth_rate_per_s") == 0.0
    out["amp_rel_err"] = a_r / a_t - 1.0 if detected and steady and a_t and a_r else None
    g_t, g_r = sub_t.get("growth_rate_per_s"), growth.get("rate_per_s")
    if detected and g_t and g_t > 0 and g_r is not None and math.isfinite(g_r):
        out["growth_rel_err"] = g_r / g_t - 1.0
        lo, hi = (growth.get("ci95_per_s") or [None, None])[:2]
        out["growth_ci_covers"] = lo is not None and hi is not None and lo <= g_t <= hi
    else:
        out["growth_rel_err"] = None
        out["growth_ci_covers"] = None
    out["growth_state"] = growth.get("state")
    return out
