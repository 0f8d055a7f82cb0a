"""Record simulator with known ground truth, for the demo and for tests.

Every record is **invented data**, never a measurement. Each carries its truth: classes, line frequencies
and peak amplitudes (acceleration, g), and for the instability kinds the Floquet growth rate.

Kinds (``KINDS``):

``healthy``       1X and harmonics, broadband noise, two bearing-like tones with 1X sidebands.
``parametric``    a Mathieu-type modulated mode near 0.5X: noise-excited below threshold, and, when
                  ``ratio`` (h / h_c) > 1, growth from the noise at the Floquet rate from ``onset_s`` on,
                  saturating at ``sub_amp_g``.
``two-mode``      2:1 autoparametric pair (forced mode at F, subharmonic mode at F/2, quadratic coupling):
                  after a load step at ``onset_s`` energy leaves the forced mode, whose 1X saturates at a2c.
                  ``method="slow"`` (averaged slow flow, fast) or ``method="ode"`` (full ODE, exact).
``half-order``    steady 0.5X with 1.5X and 2.5X (rub or looseness), locked to speed, no growth.
``whirl``         sub-synchronous line at 0.40-0.47X that wanders (not locked to speed).
``speed-drift``   healthy machine whose speed drifts slowly (default +2 % over the record).
``onset-growth``  a steady 0.5X line (``sub_amp_g``, 0.02 g; 0 for none) that starts growing at
                  ``growth_per_s`` (0.5 1/s) from ``onset_s`` (half the record) on, levelling off at
                  ``sat_amp_g`` when given (Landau form); with no steady line it grows from ``seed_amp_g``.
``speed-ramp``    the shaft speed moves by ``change_pct`` (4 %) over the record, ``profile`` "ramp" (default),
                  "step" or "swing" (analysis.sim_models.speed_profile); a 0.5X line (``sub_amp_g``, 0.03 g)
                  locked to the shaft phase with 1.5X; ``sub_amp_g=0`` for none; ``fixed_tone_hz`` adds
                  lines at fixed frequencies (structural resonances unrelated to speed, ``fixed_tone_peak_g``
                  0.03 g each): the negatives for order tracking.
``ramp-whirl``    the same speed profiles with a whirl line at ``whirl_order`` (0.42-0.46, drawn) of the
                  mean speed that follows the speed only by ``follow`` (0.5) of its change: not locked.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from analysis.physics.stability import floquet_growth, threshold_floquet
from analysis.sim import sim_models as sm

__all__ = ["KINDS", "SimulatedRecord", "simulate"]

KINDS = (
    "healthy",
    "parametric",
    "two-mode",
    "half-order",
    "whirl",
    "speed-drift",
    "onset-growth",
    "speed-ramp",
    "ramp-whirl",
)
NOTE = "invented record from the halfwatch simulator; not a measurement"


@dataclass(frozen=True)
class SimulatedRecord:
    """Acceleration samples (``units``, float64) at ``fs_hz`` with the ground truth as a JSON-ready dict."""

    samples: np.ndarray
    fs_hz: float
    units: str
    truth: dict = field(default_factory=dict)


def _positive(name: str, value, *, allow_zero: bool = False) -> float:
    v = float(value)
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise ValueError(f"{name} must be a finite number {'>=' if allow_zero else '>'} 0, got {value!r}")
    return v


class _Builder:
    """Accumulates the signal and the truth of one record."""

    def __init__(
        self, kind: str, seed: int, fs_hz: float, duration_s: float, forcing_hz: float, drift_pct: float
    ):
        self.rng = np.random.default_rng(seed)
        self.fs, self.kind = fs_hz, kind
        n = int(round(duration_s * fs_hz))
        if n < 64:
            raise ValueError(f"duration_s * fs_hz gives {n} samples; need at least 64")
        if forcing_hz * 6 >= fs_hz / 2:
            raise ValueError(
                f"fs_hz={fs_hz:g} is too low for forcing_hz={forcing_hz:g}: need fs_hz > 12 * forcing"
            )
        self.t = np.arange(n) / fs_hz
        self.speed = forcing_hz * (1.0 + drift_pct / 100.0 * self.t / max(duration_s, 1e-12))
        self.phase = (
            2 * math.pi * np.concatenate(([0.0], np.cumsum(0.5 * (self.speed[1:] + self.speed[:-1])) / fs_hz))
        )
        self.x = np.zeros(n)
        self.lines: list[dict] = []
        self.truth: dict = {
            "kind": kind,
            "note": NOTE,
            "seed": seed,
            "fs_hz": fs_hz,
            "duration_s": duration_s,
            "units": "g",
            "forcing_hz": float(self.speed.mean()),
            "speed_hz_start": float(self.speed[0]),
            "speed_hz_end": float(self.speed[-1]),
        }

    def tone(self, name: str, order: float, amp: float, *, locked: bool = True, extra_phase=None) -> None:
        if amp <= 0:
            return
        ph = order * self.phase + self.rng.uniform(0, 2 * math.pi)
        if extra_phase is not None:
            ph = ph + extra_phase
        self.x += amp * np.cos(ph)
        self.lines.append(
            {
                "name": name,
                "order": order,
                "frequency_hz": order * float(self.speed.mean()),
                "amplitude": amp,
                "locked": locked,
            }
        )

    def background(self, p: dict, *, one_x: bool = True) -> None:
        if one_x:
            self.tone("1X", 1.0, p.pop("amp_1x_g", 0.2))
        else:
            p.pop("amp_1x_g", None)
        self.tone("2X", 2.0, p.pop("amp_2x_g", 0.08))
        self.tone("3X", 3.0, p.pop("amp_3x_g", 0.03))
        tone_g = p.pop("bearing_tone_g", 0.01)
        for order in (3.58, 5.42):  # bearing-like, non-synchronous orders with 1X sidebands
            self.tone(f"tone {order}X", order, tone_g, locked=False)
            self.tone(f"tone {order}X-1X", order - 1, 0.35 * tone_g, locked=False)
            self.tone(f"tone {order}X+1X", order + 1, 0.35 * tone_g, locked=False)
        self.noise_g = p.pop("noise_g", 0.02)
        self.x += self.noise_g * self.rng.standard_normal(self.x.size)

    def finish(self, sub: dict, params: dict) -> SimulatedRecord:
        n0 = self.noise_g**2 / (self.fs / 2.0)  # one-sided white-noise density, g^2/Hz
        if sub.get("amplitude"):
            sub["snr_db_1hz"] = 10 * math.log10(sub["amplitude"] ** 2 / 2.0 / n0)
        self.truth.update(
            {
                "classes": [sub["class"]],
                "subharmonic": sub,
                "lines": self.lines,
                "noise_g_rms": self.noise_g,
                "params": params,
            }
        )
        return SimulatedRecord(self.x, self.fs, "g", self.truth)


def _none_sub() -> dict:
    return {
        "present": False,
        "class": "none",
        "frequency_hz": None,
        "order": None,
        "amplitude": None,
        "growth_rate_per_s": None,
        "onset_s": None,
        "locked": None,
    }


def simulate(
    kind: str,
    *,
    seed: int = 0,
    fs_hz: float = 8192.0,
    duration_s: float = 16.0,
    forcing_hz: float = 24.75,
    **params,
) -> SimulatedRecord:
    """Generate one invented acceleration record (units g) of the given kind with its truth.

    Common parameters: ``amp_1x_g`` (0.2), ``amp_2x_g`` (0.08), ``amp_3x_g`` (0.03), ``bearing_tone_g``
    (0.01), ``noise_g`` (broadband r.m.s., 0.02), ``drift_pct`` (speed change over the record in %, 0; 2 for
    ``speed-drift``; not for the instability kinds). Kind parameters are listed in the module docstring and in
    the README; unknown names raise ValueError.
    """
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {', '.join(KINDS)}; got {kind!r}")
    fs = _positive("fs_hz", fs_hz)
    dur = _positive("duration_s", duration_s)
    fw = _positive("forcing_hz", forcing_hz)
    p = dict(params)
    given = dict(params)
    drift = float(p.pop("drift_pct", 2.0 if kind == "speed-drift" else 0.0))
    if drift and kind in ("parametric", "two-mode", "speed-ramp", "ramp-whirl"):
        raise ValueError(
            "drift_pct is only for healthy, half-order, whirl and speed-drift records (speed-ramp and "
            "ramp-whirl take change_pct and profile)"
        )
    b = _Builder(kind, int(seed), fs, dur, fw, drift)
    if kind in ("healthy", "speed-drift"):
        b.background(p)
        sub = _none_sub()
    elif kind == "half-order":
        sub = _half_order(b, p)
    elif kind == "whirl":
        sub = _whirl(b, p)
    elif kind == "onset-growth":
        sub = _onset_growth(b, p, dur)
    elif kind == "speed-ramp":
        sub = _speed_ramp(b, p)
    elif kind == "ramp-whirl":
        sub = _ramp_whirl(b, p)
    elif kind == "parametric":
        sub = _parametric(b, p, fw)
    else:
        sub = _two_mode(b, p, fw)
    if p:
        raise ValueError(f"unknown parameter(s) for kind {kind!r}: {', '.join(sorted(p))}")
    return b.finish(sub, given)


def _half_order(b: _Builder, p: dict) -> dict:
    amp = p.pop("sub_amp_g", 0.03)
    b.background(p)
    b.tone("0.5X", 0.5, amp)
    b.tone("1.5X", 1.5, p.pop("amp_1p5x_g", 0.5 * amp))
    b.tone("2.5X", 2.5, p.pop("amp_2p5x_g", 0.25 * amp))
    return {
        "present": True,
        "class": "half-order",
        "frequency_hz": 0.5 * b.truth["forcing_hz"],
        "order": 0.5,
        "amplitude": amp,
        "growth_rate_per_s": 0.0,
        "onset_s": None,
        "locked": True,
    }


def _onset_growth(b: _Builder, p: dict, dur: float) -> dict:
    steady = _positive("sub_amp_g", p.pop("sub_amp_g", 0.02), allow_zero=True)
    a0 = steady if steady > 0 else _positive("seed_amp_g", p.pop("seed_amp_g", 1e-4))
    p.pop("seed_amp_g", None)
    lam = _positive("growth_per_s", p.pop("growth_per_s", 0.5))
    t0 = float(p.pop("onset_s", 0.5 * dur))
    if not 0.0 <= t0 < dur:
        raise ValueError(f"onset_s must lie within the record (0 to {dur:g} s), got {t0}")
    sat = p.pop("sat_amp_g", None)
    sat = None if sat is None else _positive("sat_amp_g", sat)
    if sat is not None and sat <= a0:
        raise ValueError("sat_amp_g must exceed the starting amplitude")
    b.background(p)
    env = sm.onset_envelope(b.t, a0, lam, t0, sat)
    b.x += env * np.cos(0.5 * b.phase + b.rng.uniform(0, 2 * math.pi))
    b.lines.append(
        {
            "name": "0.5X",
            "order": 0.5,
            "frequency_hz": 0.5 * b.truth["forcing_hz"],
            "amplitude": float(env[-1]),
            "locked": True,
        }
    )
    return {
        "present": True,
        "class": "half-order",
        "frequency_hz": 0.5 * b.truth["forcing_hz"],
        "order": 0.5,
        "amplitude": float(env[-1]),
        "steady_amp_g": steady,
        "growth_rate_per_s": lam,
        "onset_s": t0,
        "sat_amp_g": sat,
        "locked": True,
    }


def _moving_speed(b: _Builder, p: dict) -> None:
    """Give the builder a moving shaft speed (change_pct, profile) and its phase; truth gets the profile."""
    change = float(p.pop("change_pct", 4.0))
    if not 0.0 <= change <= 20.0:
        raise ValueError(f"change_pct must be between 0 and 20, got {change}")
    shape = str(p.pop("profile", "ramp"))
    b.speed = sm.speed_profile(b.t, b.truth["forcing_hz"], change, shape)
    b.phase = 2 * math.pi * np.concatenate(([0.0], np.cumsum(0.5 * (b.speed[1:] + b.speed[:-1])) / b.fs))
    b.truth.update(
        {
            "forcing_hz": float(b.phase[-1] / (2 * math.pi) / max(b.t[-1], 1e-12)),
            "speed_hz_start": float(b.speed[0]),
            "speed_hz_end": float(b.speed[-1]),
            "speed_hz_min": float(b.speed.min()),
            "speed_hz_max": float(b.speed.max()),
            "profile": shape,
            "change_pct": change,
        }
    )


def _speed_ramp(b: _Builder, p: dict) -> dict:
    _moving_speed(b, p)
    amp = _positive("sub_amp_g", p.pop("sub_amp_g", 0.03), allow_zero=True)
    fixed = p.pop("fixed_tone_hz", ())
    fixed = [float(f) for f in (fixed if isinstance(fixed, list | tuple) else [fixed])]
    fixed_peak_g = _positive("fixed_tone_peak_g", p.pop("fixed_tone_peak_g", 0.03))
    b.background(p)
    for f in fixed:  # fixed-frequency lines: an order that moves against the shaft
        b.x += fixed_peak_g * np.cos(2 * math.pi * f * b.t + b.rng.uniform(0, 2 * math.pi))
        b.lines.append(
            {
                "name": f"fixed {f:g} Hz",
                "order": f / b.truth["forcing_hz"],
                "frequency_hz": f,
                "amplitude": fixed_peak_g,
                "locked": False,
            }
        )
    if amp == 0:
        return _none_sub()
    b.tone("0.5X", 0.5, amp)
    b.tone("1.5X", 1.5, 0.5 * amp)
    return {
        "present": True,
        "class": "half-order",
        "frequency_hz": 0.5 * b.truth["forcing_hz"],
        "order": 0.5,
        "amplitude": amp,
        "growth_rate_per_s": 0.0,
        "onset_s": None,
        "locked": True,
    }


def _ramp_whirl(b: _Builder, p: dict) -> dict:
    _moving_speed(b, p)
    order = p.pop("whirl_order", None)
    order = float(b.rng.uniform(0.42, 0.46)) if order is None else float(order)
    if not 0.3 <= order <= 0.49:
        raise ValueError(f"whirl_order must be between 0.30 and 0.49, got {order}")
    follow = float(p.pop("follow", 0.5))
    amp = _positive("sub_amp_g", p.pop("sub_amp_g", 0.04))
    b.background(p)
    f_mean = b.truth["forcing_hz"]
    freq = order * (f_mean + follow * (b.speed - f_mean))  # follows the speed change only partly
    ph = 2 * math.pi * np.cumsum(freq) / b.fs - order * b.phase
    b.tone("whirl", order, amp, locked=False, extra_phase=ph)
    b.lines[-1]["frequency_hz"] = float(freq.mean())
    return {
        "present": True,
        "class": "sub-synchronous",
        "frequency_hz": float(freq.mean()),
        "order": float(freq.mean() / f_mean),
        "amplitude": amp,
        "growth_rate_per_s": 0.0,
        "onset_s": None,
        "locked": False,
        "follow": follow,
    }


def _whirl(b: _Builder, p: dict) -> dict:
    order = p.pop("whirl_order", None)
    order = float(b.rng.uniform(0.40, 0.47)) if order is None else float(order)
    if not 0.3 <= order <= 0.49:
        raise ValueError(f"whirl_order must be between 0.30 and 0.49, got {order}")
    amp = p.pop("sub_amp_g", 0.04)
    wander = p.pop("wander_pct", 0.3)
    b.background(p)
    # not locked: its own frequency, which wanders slowly (a smoothed random walk, r.m.s. ``wander_pct``)
    f_mean = order * b.truth["forcing_hz"]
    steps = b.rng.standard_normal(b.t.size // 256 + 2).cumsum()
    steps = (steps - steps.mean()) / max(steps.std(), 1e-12)
    freq = f_mean * (1 + wander / 100 * np.interp(b.t, np.arange(steps.size) * 256 / b.fs, steps))
    ph = 2 * math.pi * np.cumsum(freq) / b.fs - order * b.phase
    b.tone("whirl", order, amp, locked=False, extra_phase=ph)
    b.lines[-1]["frequency_hz"] = float(freq.mean())
    return {
        "present": True,
        "class": "sub-synchronous",
        "frequency_hz": float(freq.mean()),
        "order": float(freq.mean() / b.truth["forcing_hz"]),
        "amplitude": amp,
        "growth_rate_per_s": 0.0,
        "onset_s": None,
        "locked": False,
    }


def _parametric(b: _Builder, p: dict, fw: float) -> dict:
    f0 = float(p.pop("f0_hz", fw / 2.0))
    zeta = float(p.pop("zeta", 0.01))
    ratio = _positive("ratio", p.pop("ratio", 1.6), allow_zero=True)
    onset = float(p.pop("onset_s", 0.3 * b.truth["duration_s"]))
    amp = _positive("sub_amp_g", p.pop("sub_amp_g", 0.1))
    floor = _positive("floor_g", p.pop("floor_g", 0.002))
    pre = float(p.pop("pre_ratio", 0.8))
    b.background(p)
    hc = threshold_floquet(f0, zeta, fw)
    if not math.isfinite(hc):
        raise ValueError(f"f0_hz={f0:g} is too far from forcing_hz/2 for a half-order instability")
    h_pre = min(pre, ratio) * hc
    pre_x, pre_info = sm.mathieu_precursor(
        b.t, b.rng, f0_hz=f0, zeta=zeta, forcing_hz=fw, modulation=h_pre, rms=floor
    )
    # the noise-excited mode is a broad bump at 0.5X (two Lorentzians), not a line; kept in the truth
    b.truth["precursor"] = {"rms_g": floor, "modulation": h_pre, "ratio_to_threshold": h_pre / hc,
                            "narrow_rate_per_s": pre_info["narrow_rate_per_s"],
                            "broad_rate_per_s": pre_info["broad_rate_per_s"],
                            "note": "noise-excited mode below threshold: a broad peak at 0.5X, not a line"}
    floquet = {
        "f0_hz": f0,
        "zeta": zeta,
        "threshold_modulation": hc,
        "modulation": ratio * hc,
        "ratio_to_threshold": ratio,
    }
    if ratio <= 1.0:
        b.x += pre_x
        res = floquet_growth(f0, zeta, fw, ratio * hc)
        floquet.update(
            {
                "growth_rate_per_s": res.growth_rate_per_s,
                "response": res.response,
                "narrow_rate_per_s": pre_info["narrow_rate_per_s"],
                "broad_rate_per_s": pre_info["broad_rate_per_s"],
            }
        )
        b.truth["floquet"] = floquet
        sub = _none_sub()
        sub["growth_rate_per_s"] = res.growth_rate_per_s
        return sub
    t0 = round(onset * fw) / fw
    if not 0.0 <= t0 < b.t[-1]:
        raise ValueError(f"onset_s must lie inside the record (0 to {b.t[-1]:.3g} s), got {onset}")
    b.x += pre_x
    x0 = b.rng.standard_normal(2)
    grow, info = sm.mathieu_growing(
        b.t,
        f0_hz=f0,
        zeta=zeta,
        forcing_hz=fw,
        modulation=ratio * hc,
        t0=t0,
        a_start=floor,
        a_sat=amp,
        x0=x0 / np.linalg.norm(x0),
    )
    b.x += grow
    lam = info["growth_rate_per_s"]
    b.lines.append({"name": "0.5X", "order": 0.5, "frequency_hz": fw / 2, "amplitude": amp, "locked": True})
    b.lines.append(
        {
            "name": "1.5X",
            "order": 1.5,
            "frequency_hz": 1.5 * fw,
            "amplitude": amp * info["ratio_3_to_1"],
            "locked": True,
        }
    )
    floquet.update({"growth_rate_per_s": lam, "response": "half-order"})
    b.truth["floquet"] = floquet
    tau_end = b.t[-1] - t0
    k = (floor / amp) ** 2
    amp_end = floor / math.sqrt(math.exp(-2 * lam * tau_end) * (1 - k) + k)
    return {
        "present": True,
        "class": "half-order",
        "frequency_hz": fw / 2,
        "order": 0.5,
        "amplitude": amp,
        "amplitude_end": amp_end,
        "growth_rate_per_s": lam,
        "onset_s": t0,
        "locked": True,
        "start_amplitude": floor,
        "time_to_saturation_s": t0 + math.log(amp / floor) / lam,
    }


def _two_mode(b: _Builder, p: dict, fw: float) -> dict:
    setup = sm.TwoModeSetup(
        float(p.pop("f_sub_hz", fw / 2)),
        float(p.pop("f_forced_hz", fw)),
        fw,
        float(p.pop("zeta_sub", 0.01)),
        float(p.pop("zeta_forced", 0.02)),
    )
    ratio = _positive("ratio", p.pop("ratio", 3.0))
    onset = float(p.pop("onset_s", 0.2 * b.truth["duration_s"]))
    amp_1x = _positive("amp_1x_g", p.pop("amp_1x_g", 0.2))
    pre = float(p.pop("pre_ratio", 0.8))
    method = p.pop("method", "slow")
    start_rel = _positive("start_rel", p.pop("start_rel", 1e-4))
    if method not in ("slow", "ode"):
        raise ValueError(f"method must be 'slow' or 'ode', got {method!r}")
    b.background(p, one_x=False)
    a2c = setup.threshold_amplitude()
    f_c = a2c / abs(setup.gain)
    t0 = round(onset * fw) / fw
    scale = amp_1x / (setup.big_w**2 * a2c)  # g per model unit of acceleration: 1X at a2c reads amp_1x
    if method == "ode":
        _, _, acc1, acc2 = sm.two_mode_ode(
            b.t, setup, force=ratio * f_c, force_before=pre * f_c, t0=t0, u1_start=start_rel * a2c
        )
    else:
        u1, u2 = sm.two_mode_slow(
            b.t,
            b.rng,
            setup,
            force_before=pre * f_c,
            force_after=ratio * f_c,
            t0=t0,
            noise_sub=start_rel * a2c,
        )
        acc1, acc2 = -((setup.big_w / 2) ** 2) * u1, -(setup.big_w**2) * u2
    b.x += scale * (acc1 + acc2)
    a1 = setup.saturated_sub_amplitude(ratio * f_c)
    h = setup.alpha1 * ratio * a2c / setup.w1**2
    lam = floquet_growth(setup.f_sub_hz, setup.zeta_sub, fw, h).growth_rate_per_s
    sub_amp = scale * (setup.big_w / 2) ** 2 * a1
    one_x = scale * setup.big_w**2 * (a2c if a1 > 0 else ratio * a2c)
    b.lines.append(
        {
            "name": "1X",
            "order": 1.0,
            "frequency_hz": fw,
            "amplitude": one_x,
            "locked": True,
            "before_onset": scale * setup.big_w**2 * pre * a2c,
        }
    )
    b.lines.append(
        {"name": "0.5X", "order": 0.5, "frequency_hz": fw / 2, "amplitude": sub_amp, "locked": True}
    )
    b.truth["floquet"] = {
        "f0_hz": setup.f_sub_hz,
        "zeta": setup.zeta_sub,
        "modulation": h,
        "threshold_modulation": threshold_floquet(setup.f_sub_hz, setup.zeta_sub, fw),
        "growth_rate_per_s": lam,
        "ratio_to_threshold": ratio,
    }
    b.truth["two_mode"] = {
        "a2c": a2c,
        "a1_saturated": a1,
        "force_threshold": f_c,
        "method": method,
        "one_x_saturated_g": scale * setup.big_w**2 * a2c,
    }
    present = a1 > 0
    return {
        "present": present,
        "class": "half-order" if present else "none",
        "frequency_hz": fw / 2,
        "order": 0.5,
        "amplitude": sub_amp if present else None,
        "growth_rate_per_s": lam,
        "onset_s": t0 if present else None,
        "locked": True,
    }
