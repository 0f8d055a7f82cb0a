"""Invented measurement-point histories (one row per record) for the demo and for tests.

A variable-speed machine visited at irregular times: each record has a 1X frequency, a 1X amplitude that
rises with speed squared (unbalance-like) and slowly with time (wear), and a half-order line that is present
when the 1X amplitude exceeds the first-order tongue threshold a_c(f) = h_c(f) / k of the damped Mathieu
model (Landau & Lifshitz, Mechanics §27, with friction), with a little label noise. Growing records carry the
first-order
growth rate plus noise. Invented data, never measurements.
"""

from __future__ import annotations

import numpy as np

from analysis.physics.tongue import band as _band
from analysis.physics.tongue import growth_rate as _growth
from analysis.physics.tongue import threshold_amplitude as _threshold_amp

__all__ = ["repeat_readings", "simulate_history"]


def simulate_history(
    n: int,
    *,
    seed: int = 0,
    f0_hz: float = 12.4,
    zeta: float = 0.012,
    k: float = 0.25,
    speed_range_hz: tuple[float, float] = (20.0, 30.0),
    amp_at_max_speed: float = 0.3,
    wear_per_day: float = 0.003,
    start_day: float = 20400.0,
    days: float = 365.0,
    label_noise: float = 0.02,
    growth_noise: float = 0.05,
    sub_floor: float = 0.002,
) -> dict:
    """Return column arrays (time_days, speed_hz, amp_1x, amp_sub, present, growth_rate_per_s) and truth.

    ``k`` maps the 1X amplitude to the modulation depth (h = k a). Present records have an amp_sub growing
    with the log margin; absent ones read the floor ``sub_floor``. ``growth_rate_per_s`` is filled for about
    a third of the present records (those caught while growing), NaN elsewhere.
    """
    if n < 1:
        raise ValueError(f"n must be at least 1, got {n}")
    rng = np.random.default_rng(seed)
    t = start_day + np.sort(rng.uniform(0.0, days, n))
    lo, hi = speed_range_hz
    f = rng.uniform(lo, hi, n)
    wear = 1.0 + wear_per_day * (t - start_day)
    a = amp_at_max_speed * (f / hi) ** 2 * wear * np.exp(0.05 * rng.standard_normal(n))
    ac = _threshold_amp(f, f0_hz, zeta, k)
    margin = np.log(a / ac)
    present = (margin > 0).astype(float)
    flip = rng.random(n) < label_noise
    present[flip] = 1.0 - present[flip]
    amp_sub = np.where(
        present > 0, sub_floor * (1.0 + 40.0 * np.sqrt(np.clip(margin, 0.0, None)) + 2.0), sub_floor
    ) * np.exp(0.1 * rng.standard_normal(n))
    lam = _growth(f, a, f0_hz, zeta, k)
    growth = np.full(n, np.nan)
    caught = (present > 0) & (lam > 0) & (rng.random(n) < 0.35)
    growth[caught] = lam[caught] * (1.0 + growth_noise * rng.standard_normal(int(caught.sum())))
    truth = {
        "f0_hz": f0_hz,
        "zeta": zeta,
        "k": k,
        "note": "invented history; not measurements",
        "unstable_band_at_last_amp": _band(f0_hz, zeta, k, float(a[-1])),
    }
    return {
        "time_days": t,
        "speed_hz": f,
        "amp_1x": a,
        "amp_sub": amp_sub,
        "present": present,
        "growth_rate_per_s": growth,
        "truth": truth,
    }


def repeat_readings(h: dict, per_day: int, *, seed: int = 0, scatter: float = 0.001) -> dict:
    """Each record of a history read ``per_day`` times within its day, hourly: the same machine state, so the
    same label and nearly the same speed, 1X amplitude and growth (relative ``scatter`` each). Dependent
    readings of this kind are what an hourly online sensor gives; the truth is that of ``h``."""
    if per_day < 1:
        raise ValueError(f"per_day must be at least 1, got {per_day}")
    rng = np.random.default_rng(seed)
    n = h["speed_hz"].size * per_day

    def rep(v):
        return np.repeat(np.asarray(v, dtype=float), per_day)

    def jitter():
        return np.exp(scatter * rng.standard_normal(n))

    return {
        "time_days": np.floor(rep(h["time_days"])) + np.tile(np.arange(per_day) / 24.0, h["speed_hz"].size),
        "speed_hz": rep(h["speed_hz"]) * jitter(),
        "amp_1x": rep(h["amp_1x"]) * jitter(),
        "amp_sub": rep(h["amp_sub"]) * jitter(),
        "present": rep(h["present"]),
        "growth_rate_per_s": rep(h["growth_rate_per_s"]) * jitter(),
        "truth": h["truth"],
    }
