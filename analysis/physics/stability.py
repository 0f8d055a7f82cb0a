"""Stability of a parametrically excited mode: damped Mathieu equation and its Floquet exponents.

Model (one mode, unit modal mass)::

    x'' + 2 zeta w0 x' + w0^2 (1 + h cos(W t)) x = 0,     w0 = 2 pi f0,  W = 2 pi f_forcing

``h`` is the modulation depth (dimensionless), ``W`` the forcing (pump) frequency.  The principal
instability region ("tongue") sits around W = 2 w0; inside it the mode grows at exactly W/2, the
half-order (0.5X) line.

Two ways to get the growth rate (exponent of the amplitude envelope, 1/s):

* Floquet: the monodromy matrix over one forcing period, integrated with DOP853 at tight tolerances
  (Floquet theory; Liouville's formula det M = exp(-2 zeta w0 T) is checked on every call).
* First order (Landau & Lifshitz, *Mechanics*, §27, damping included at the end of §27):
  lambda = -zeta w0 + 1/2 sqrt((h w0 / 2)^2 - eps^2), eps = W - 2 w0,
  threshold h_c = 2 sqrt((eps/w0)^2 + 4 zeta^2).

The chart uses the exact substitution x = exp(-zeta w0 t) y, tau = W t / 2, which turns the model into
Mathieu's standard form y'' + (a - 2 q cos 2 tau) y = 0 with a = 4 w0^2 (1 - zeta^2) / W^2,
q = 2 w0^2 h / W^2, and a fixed-step RK4 integration of y over half a period, vectorised over the whole
grid (the potential is even, so the half period gives the trace of the monodromy matrix).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

__all__ = [
    "FloquetResult",
    "StabilityChart",
    "StabilitySummary",
    "floquet_growth",
    "growth_rate_first_order",
    "mathieu_standard_form",
    "monodromy",
    "stability_chart",
    "stability_summary",
    "threshold_first_order",
    "threshold_curve",
    "threshold_floquet",
    "tongue_edges_first_order",
    "tongue_edges_floquet",
    "tongue_edges_undamped",
]

TWO_PI = 2.0 * math.pi


def _check(
    name: str, value: float, *, low: float = 0.0, low_ok: bool = False, high: float | None = None
) -> float:
    """Return ``value`` as float or raise ValueError naming the parameter and the allowed range."""
    v = float(value)
    bad_low = v < low if low_ok else v <= low
    if not math.isfinite(v) or bad_low or (high is not None and v >= high):
        rng = f"{'>=' if low_ok else '>'} {low:g}" + (f" and < {high:g}" if high is not None else "")
        raise ValueError(f"{name} must be a finite number {rng}, got {value!r}")
    return v


def _params(f0_hz: float, zeta: float, forcing_hz: float, modulation: float | None = None):
    f0 = _check("f0_hz", f0_hz)
    z = _check("zeta", zeta, low_ok=True, high=1.0)
    fw = _check("forcing_hz", forcing_hz)
    h = None if modulation is None else _check("modulation", modulation, low_ok=True)
    return f0, z, fw, h


@dataclass(frozen=True, slots=True)
class FloquetResult:
    """Floquet analysis of the damped Mathieu equation over one forcing period.

    ``growth_rate_per_s`` is max Re of the characteristic exponents (envelope exponent, 1/s).
    ``response`` is ``"half-order"`` when the dominant multiplier is real and negative (response at W/2),
    ``"harmonic"`` when it is real and positive (response at W), ``"stable"`` for complex multipliers.
    """

    growth_rate_per_s: float
    multipliers: tuple[complex, complex]
    det_monodromy: float
    det_expected: float
    response: str


def mathieu_standard_form(
    f0_hz: float, zeta: float, forcing_hz: float, modulation: float
) -> tuple[float, float]:
    """Map the damped model to Mathieu's standard form: returns (a, q) with q >= 0.

    a = 4 w0^2 (1 - zeta^2) / W^2, q = 2 w0^2 h / W^2 (the sign of q only shifts tau by pi/2).
    The physical growth rate is (W/2) mu(a, q) - zeta w0, mu the standard-form exponent per unit tau.
    """
    f0, z, fw, h = _params(f0_hz, zeta, forcing_hz, modulation)
    r2 = (f0 / fw) ** 2
    return 4.0 * r2 * (1.0 - z * z), 2.0 * r2 * h


def monodromy(
    f0_hz: float,
    zeta: float,
    forcing_hz: float,
    modulation: float,
    *,
    rtol: float = 1e-11,
    atol: float = 1e-13,
) -> np.ndarray:
    """Monodromy matrix over one forcing period, state [x, dx/dtau], tau = W t / 2 (period pi).

    The time scaling keeps the state of order one so that ``atol`` is meaningful; it is a similarity
    transform of the physical monodromy, so the multipliers, trace and determinant are the same.
    """
    f0, z, fw, h = _params(f0_hz, zeta, forcing_hz, modulation)
    r = 2.0 * f0 / fw  # w0 / (W/2)
    c = 2.0 * z * r
    k0 = r * r

    def rhs(tau, y):
        k = k0 * (1.0 + h * math.cos(2.0 * tau))
        return [y[1], -c * y[1] - k * y[0], y[3], -c * y[3] - k * y[2]]

    sol = solve_ivp(rhs, (0.0, math.pi), [1.0, 0.0, 0.0, 1.0], method="DOP853", rtol=rtol, atol=atol)
    if not sol.success:  # pragma: no cover - DOP853 does not fail on this smooth linear system
        raise RuntimeError(f"Floquet integration failed: {sol.message}")
    return sol.y[:, -1].reshape(2, 2).T


def floquet_growth(
    f0_hz: float,
    zeta: float,
    forcing_hz: float,
    modulation: float,
    *,
    rtol: float = 1e-11,
    atol: float = 1e-13,
) -> FloquetResult:
    """Largest Floquet growth rate (1/s) of the damped Mathieu equation.

    Uses the trace formula for a 2x2 monodromy M: r = |tr M| / (2 sqrt(det M)), lambda = -zeta w0 +
    arccosh(r)/T when r > 1 (real multipliers), else lambda = -zeta w0 (complex multipliers).
    Raises RuntimeError if Liouville's formula det M = exp(-2 zeta w0 T) is violated by more than 1e-8.
    """
    f0, z, fw, h = _params(f0_hz, zeta, forcing_hz, modulation)
    m = monodromy(f0, z, fw, h, rtol=rtol, atol=atol)
    w0, period = TWO_PI * f0, 1.0 / fw
    det_expected = math.exp(-2.0 * z * w0 * period)
    det = float(np.linalg.det(m))
    scale = max(1.0, float(np.max(np.abs(m))) ** 2)
    if abs(det - det_expected) > 1e-8 * scale:
        raise RuntimeError(f"monodromy determinant {det:.12g} differs from Liouville's {det_expected:.12g}")
    tr = float(np.trace(m))
    ratio = abs(tr) / (2.0 * math.sqrt(det_expected))
    lam = -z * w0 + (math.acosh(ratio) / period if ratio > 1.0 else 0.0)
    if ratio > 1.0:
        response = "half-order" if tr < 0 else "harmonic"
    else:
        response = "stable"
    rho = np.linalg.eigvals(m)
    return FloquetResult(lam, (complex(rho[0]), complex(rho[1])), det, det_expected, response)


def growth_rate_first_order(f0_hz: float, zeta: float, forcing_hz: float, modulation):
    """First-order growth rate near W = 2 w0 (Landau & Lifshitz, Mechanics §27, with friction).

    lambda = -zeta w0 + 1/2 sqrt((h w0/2)^2 - eps^2) inside the undamped tongue, -zeta w0 outside.
    ``modulation`` may be an array; the result then has its shape.
    """
    f0, z, fw, _ = _params(f0_hz, zeta, forcing_hz)
    w0 = TWO_PI * f0
    eps = TWO_PI * fw - 2.0 * w0
    h = np.asarray(modulation, dtype=float)
    disc = (h * w0 / 2.0) ** 2 - eps**2
    out = -z * w0 + 0.5 * np.sqrt(np.clip(disc, 0.0, None))
    return float(out) if out.ndim == 0 else out


def threshold_first_order(f0_hz: float, zeta: float, forcing_hz):
    """First-order threshold modulation h_c = 2 sqrt((eps/w0)^2 + 4 zeta^2); 4 zeta at exact tuning.

    ``forcing_hz`` may be an array.
    """
    f0 = _check("f0_hz", f0_hz)
    z = _check("zeta", zeta, low_ok=True, high=1.0)
    fw = np.asarray(forcing_hz, dtype=float)
    detune = (fw - 2.0 * f0) / f0
    out = 2.0 * np.sqrt(detune**2 + 4.0 * z * z)
    return float(out) if out.ndim == 0 else out


def threshold_floquet(
    f0_hz: float, zeta: float, forcing_hz: float, *, h_max: float = 2.0, xtol: float = 1e-10
) -> float:
    """Threshold modulation h_c where the Floquet growth rate crosses zero (brentq); inf if above ``h_max``.

    The bracket starts at the first-order threshold and widens by 1.5x steps up to ``h_max``.
    """
    f0, z, fw, _ = _params(f0_hz, zeta, forcing_hz)
    g = _onset_function(f0, z)
    hi = min(h_max, max(1.2 * threshold_first_order(f0, z, fw), 1e-6))
    while g(fw, hi) <= 0.0:
        if hi >= h_max:
            return math.inf
        hi = min(h_max, 1.5 * hi)
    if g(fw, 0.0) >= 0.0:
        return 0.0
    return float(brentq(lambda h: g(fw, h), 0.0, hi, xtol=xtol, rtol=1e-12))


def _onset_function(f0: float, z: float):
    """g(W, h) = |tr M| / (2 sqrt(det M)) - cosh(zeta w0 T): negative stable, positive growing, 0 at onset.

    Smooth in both arguments and valid for zeta = 0 as well (where the growth rate itself is flat at 0
    on the stable side, so it cannot be bracketed).
    """
    w0 = TWO_PI * f0

    def g(fw: float, h: float) -> float:
        m = monodromy(f0, z, fw, h)
        period = 1.0 / fw
        det_expected = math.exp(-2.0 * z * w0 * period)
        return abs(float(np.trace(m))) / (2.0 * math.sqrt(det_expected)) - math.cosh(z * w0 * period)

    return g


def tongue_edges_first_order(f0_hz: float, zeta: float, modulation: float) -> tuple[float, float] | None:
    """Forcing frequencies (Hz) bounding the first-order damped tongue at depth h; None below 4 zeta.

    |W - 2 w0| < w0 sqrt(h^2/4 - 4 zeta^2) (Landau & Lifshitz, Mechanics §27, with friction).
    """
    f0 = _check("f0_hz", f0_hz)
    z = _check("zeta", zeta, low_ok=True, high=1.0)
    h = _check("modulation", modulation, low_ok=True)
    disc = h * h / 4.0 - 4.0 * z * z
    if disc <= 0.0:
        return None
    half = f0 * math.sqrt(disc)
    return 2.0 * f0 - half, 2.0 * f0 + half


def tongue_edges_floquet(
    f0_hz: float, zeta: float, modulation: float, *, xtol_hz: float = 1e-9
) -> tuple[float, float] | None:
    """Forcing frequencies (Hz) where the Floquet growth rate is zero on each side of the first tongue.

    Returns None when the mode is stable at every forcing frequency near 2 f0 for this depth.
    """
    f0 = _check("f0_hz", f0_hz)
    z = _check("zeta", zeta, low_ok=True, high=1.0)
    h = _check("modulation", modulation)

    onset = _onset_function(f0, z)

    def g(fw: float) -> float:
        return onset(fw, h)

    width = f0 * h / 2.0  # undamped first-order half-width in Hz
    scan = np.linspace(2.0 * f0 - width, 2.0 * f0 + width, 41)
    vals = np.array([g(float(f)) for f in scan])
    i = int(np.argmax(vals))
    if vals[i] <= 0.0:
        return None
    centre = float(scan[i])
    lo_out, hi_out = 2.0 * f0 - 1.5 * width, 2.0 * f0 + 1.5 * width
    lo = brentq(g, lo_out, centre, xtol=xtol_hz)
    hi = brentq(g, centre, hi_out, xtol=xtol_hz)
    return float(lo), float(hi)


def tongue_edges_undamped(modulation: float) -> tuple[float, float]:
    """Exact undamped first-tongue edges as frequency ratios W/w0, from the Mathieu characteristic values.

    Lower edge: 4/r^2 = a1(q), upper edge: 4/r^2 = b1(q), q = 2h/r^2 (r = W/w0), solved with brentq on
    ``scipy.special.mathieu_a`` / ``mathieu_b``.
    """
    from scipy.special import mathieu_a, mathieu_b

    h = _check("modulation", modulation)
    lo = brentq(lambda r: 4.0 / r**2 - mathieu_a(1, 2.0 * h / r**2), 1.0, 2.0, xtol=1e-14)
    hi = brentq(lambda r: 4.0 / r**2 - mathieu_b(1, 2.0 * h / r**2), 2.0, 4.0, xtol=1e-14)
    return float(lo), float(hi)


@dataclass(frozen=True, slots=True)
class StabilityChart:
    """Growth rates on a grid: ``growth_rate_per_s[i, j]`` at ``modulations[i]``, ``ratios[j]`` (W / w0)."""

    ratios: np.ndarray
    modulations: np.ndarray
    growth_rate_per_s: np.ndarray
    threshold_first_order: np.ndarray
    f0_hz: float
    zeta: float
    method: str
    steps: int


def _half_period_trace(a: np.ndarray, q: np.ndarray, steps: int) -> np.ndarray:
    """Delta = tr(M)/2 of y'' + (a - 2q cos 2tau) y = 0 over its period pi, from the half period.

    With the even potential, Delta = y1(pi/2) y2'(pi/2) + y1'(pi/2) y2(pi/2) for the basic solutions
    y1 (1, 0) and y2 (0, 1).  Classical RK4 with ``steps`` fixed steps on [0, pi/2], all points at once.
    """
    dt = 0.5 * math.pi / steps
    y1 = np.ones_like(a)
    v1 = np.zeros_like(a)
    y2 = np.zeros_like(a)
    v2 = np.ones_like(a)
    for i in range(steps):
        t = i * dt
        k0 = a - 2.0 * q * math.cos(2.0 * t)
        km = a - 2.0 * q * math.cos(2.0 * t + dt)
        k1 = a - 2.0 * q * math.cos(2.0 * t + 2.0 * dt)
        for pair in ((y1, v1), (y2, v2)):
            y, v = pair
            ky1, kv1 = v, -k0 * y
            ky2 = v + 0.5 * dt * kv1
            kv2 = -km * (y + 0.5 * dt * ky1)
            ky3 = v + 0.5 * dt * kv2
            kv3 = -km * (y + 0.5 * dt * ky2)
            ky4 = v + dt * kv3
            kv4 = -k1 * (y + dt * ky3)
            y += (dt / 6.0) * (ky1 + 2.0 * ky2 + 2.0 * ky3 + ky4)
            v += (dt / 6.0) * (kv1 + 2.0 * kv2 + 2.0 * kv3 + kv4)
    return y1 * v2 + v1 * y2


def stability_chart(
    f0_hz: float, zeta: float, ratios, modulations, *, method: str = "floquet", steps: int | None = None
) -> StabilityChart:
    """Grid of growth rates (1/s) over frequency ratio W/w0 and modulation depth h.

    ``method="floquet"`` integrates every grid point (vectorised fixed-step RK4 on the standard form;
    ``steps`` defaults to a count that keeps the phase step below 0.025 rad and at least 128);
    ``method="first-order"`` uses the closed form everywhere.
    """
    f0 = _check("f0_hz", f0_hz)
    z = _check("zeta", zeta, low_ok=True, high=1.0)
    r = np.asarray(ratios, dtype=float).ravel()
    h = np.asarray(modulations, dtype=float).ravel()
    if r.size == 0 or h.size == 0 or np.any(~np.isfinite(r)) or np.any(r <= 0):
        raise ValueError("ratios must be a non-empty array of positive frequency ratios W/w0")
    if np.any(~np.isfinite(h)) or np.any(h < 0):
        raise ValueError("modulations must be a non-empty array of modulation depths >= 0")
    w0 = TWO_PI * f0
    hc = threshold_first_order(f0, z, r * f0)
    hc = np.atleast_1d(hc)
    if method == "first-order":
        eps = (r[None, :] - 2.0) * w0
        disc = (h[:, None] * w0 / 2.0) ** 2 - eps**2
        lam = -z * w0 + 0.5 * np.sqrt(np.clip(disc, 0.0, None))
        return StabilityChart(r, h, lam, hc, f0, z, method, 0)
    if method != "floquet":
        raise ValueError(f"method must be 'floquet' or 'first-order', got {method!r}")
    rr, hh = np.meshgrid(r, h)
    a = 4.0 * (1.0 - z * z) / rr**2
    q = 2.0 * hh / rr**2
    kmax = float(np.max(np.abs(a) + 2.0 * q))
    n = steps or max(128, math.ceil(0.5 * math.pi * math.sqrt(kmax) / 0.025))
    delta = np.abs(_half_period_trace(a, q, n))
    mu = np.arccosh(np.maximum(delta, 1.0)) / math.pi
    lam = 0.5 * rr * w0 * mu - z * w0
    return StabilityChart(r, h, lam, hc, f0, z, method, n)


def threshold_curve(
    f0_hz: float, zeta: float, ratios, *, h_max: float = 1.0, tol: float = 1e-7, steps: int = 128
) -> np.ndarray:
    """Floquet threshold h_c at every ratio W/w0 at once (vectorised bisection); inf above ``h_max``.

    Onset where the standard-form exponent reaches mu_c = 2 zeta / r (r = W/w0), i.e. |Delta(a, q)| =
    cosh(pi mu_c); the trace comes from the same fixed-step half-period integration as the chart. Assumes one
    sign change on [0, h_max], true for the principal tongue around r = 2 with h_max <= 1.
    """
    f0 = _check("f0_hz", f0_hz)
    z = _check("zeta", zeta, low_ok=True, high=1.0)
    r = np.asarray(ratios, dtype=float).ravel()
    if r.size == 0 or np.any(~np.isfinite(r)) or np.any(r <= 0):
        raise ValueError("ratios must be a non-empty array of positive frequency ratios W/w0")
    del f0  # the dimensionless threshold depends on the ratio only
    a = 4.0 * (1.0 - z * z) / r**2
    target = np.cosh(2.0 * math.pi * z / r)

    def onset(h: np.ndarray) -> np.ndarray:
        return np.abs(_half_period_trace(a, 2.0 * h / r**2, steps)) - target

    lo = np.zeros_like(r)
    hi = np.full_like(r, float(h_max))
    above = onset(hi) > 0
    zero = onset(lo) >= 0
    for _ in range(max(1, math.ceil(math.log2(h_max / tol)))):
        mid = 0.5 * (lo + hi)
        grow = onset(mid) > 0
        hi = np.where(grow, mid, hi)
        lo = np.where(grow, lo, mid)
    out = 0.5 * (lo + hi)
    out[~above] = math.inf
    out[zero] = 0.0
    return out


@dataclass(frozen=True, slots=True)
class StabilitySummary:
    """Growth, threshold and margin of one operating point (the facts of ``halfwatch stability``)."""

    f0_hz: float
    zeta: float
    forcing_hz: float
    modulation: float
    growth_rate_per_s: float
    growth_rate_first_order_per_s: float
    threshold_modulation: float
    threshold_first_order: float
    margin_pct: float
    ratio_to_threshold_pct: float
    response: str
    det_monodromy: float
    det_expected: float

    def to_dict(self) -> dict:
        """Plain JSON-ready dict (inf becomes None)."""
        out = {}
        for k in self.__slots__:
            v = getattr(self, k)
            out[k] = None if isinstance(v, float) and not math.isfinite(v) else v
        lam = self.growth_rate_per_s
        out["doubling_time_s"] = math.log(2.0) / lam if lam > 0 else None
        out["growth_db_per_s"] = 20.0 / math.log(10.0) * lam
        return out


def stability_summary(f0_hz: float, zeta: float, forcing_hz: float, modulation: float) -> StabilitySummary:
    """Floquet growth rate, Floquet and first-order thresholds, and the margin to onset.

    ``margin_pct`` = 100 (1 - h / h_c): positive is headroom (how much the modulation may still rise
    before onset), negative means beyond threshold.  ``ratio_to_threshold_pct`` = 100 h / h_c.
    """
    f0, z, fw, h = _params(f0_hz, zeta, forcing_hz, modulation)
    res = floquet_growth(f0, z, fw, h)
    hc = threshold_floquet(f0, z, fw)
    hc1 = threshold_first_order(f0, z, fw)
    if math.isfinite(hc) and hc > 0:
        ratio = 100.0 * h / hc
        margin = 100.0 - ratio
    else:
        ratio = 0.0 if math.isinf(hc) else math.inf
        margin = 100.0 if math.isinf(hc) else -math.inf
    lam1 = growth_rate_first_order(f0, z, fw, h)
    return StabilitySummary(
        f0,
        z,
        fw,
        h,
        res.growth_rate_per_s,
        lam1,
        hc,
        hc1,
        margin,
        ratio,
        res.response,
        res.det_monodromy,
        res.det_expected,
    )
