"""Operating window: the instability tongue in (1X frequency, 1X amplitude) and the plain conclusion.

The formulas live in :mod:`analysis.tongue` (first-order damped Mathieu, Landau & Lifshitz, Mechanics §27),
the fit to a point's history in :mod:`analysis.window_fit`; both are re-exported here. This module is the
one home of the plain conclusion a planner reads (:func:`conclusion`): the unstable speed band at a given
1X amplitude with the interval the fit allows, the nearest stable speeds, whether today's speed is inside,
the skipped-speed range to program on a variable-speed drive, and where the band is extrapolated beyond
the speeds actually run. The dashboard's window page and the alarm e-mails both call it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from analysis.physics.tongue import band as _band
from analysis.physics.tongue import growth_rate as _growth  # noqa: F401  (re-exported for the simulator)
from analysis.physics.tongue import threshold_amplitude, threshold_margin
from analysis.physics.window_fit import CI_LEVEL, WindowFit, fit_operating_window, speed_ranges

__all__ = ["CAUTION", "WindowConclusion", "WindowFit", "conclusion", "fit_operating_window",
           "threshold_amplitude", "threshold_margin"]

_threshold_amp = threshold_amplitude  # the name the simulator imports

#: an edge of the band counts as seen when readings lie within this share of its speed on both sides
SUPPORT_FRAC = 0.02
#: a skipped-speed range wider than this share of its middle speed is not proposed (house choice)
MAX_SKIP_SHARE = 0.3
CAUTION = ("Speed changes follow the machine manufacturer's limits and the site's rules and permits. "
           "This is condition monitoring, not a protection or trip system.")
_DRAWS = 4000


@dataclass(frozen=True)
class WindowConclusion:
    """The plain conclusion at one 1X amplitude (see :func:`conclusion`); ``to_dict`` is its JSON."""

    status: str  # "unstable" (a band exists at this amplitude) | "stable" | "no_fit"
    usable: bool  # the fit's status is "fit" (otherwise the numbers are indicative at most)
    text: str
    caution: str
    units: str
    one_x_accel_peak: float | None = None  # the 1X acceleration (sine peak, ``units``) it was drawn for
    speed_hz: float | None = None  # the present 1X frequency
    speed_rpm: float | None = None  # the present shaft speed
    inside: bool | None = None  # the present speed lies inside the unstable band
    band_hz: tuple[float, float] | None = None
    band_rpm: tuple[float, float] | None = None
    band_low_ci95_hz: tuple[float, float] | None = None  # 95 % interval of the lower edge A
    band_high_ci95_hz: tuple[float, float] | None = None  # 95 % interval of the upper edge B
    band_probability: float | None = None  # share of the fit's plausible parameters with a band here
    stable_below_hz: float | None = None  # nearest stable speed below A (lower end of A's interval)
    stable_above_hz: float | None = None  # nearest stable speed above B (upper end of B's interval)
    stable_below_rpm: float | None = None
    stable_above_rpm: float | None = None
    skip_hz: tuple[float, float] | None = None  # skipped-speed range for a variable-speed drive
    skip_rpm: tuple[float, float] | None = None
    margin_pct: float = 0.0  # extra margin beyond the 95 % interval, % of speed, each side
    skip_text: str = ""
    observed_hz: tuple[float, float] | None = None
    observed_ranges_hz: tuple[tuple[float, float], ...] = ()
    extrapolated_low: bool = False  # the lower edge lies where no speed was run
    extrapolated_high: bool = False
    fit_status: str = ""

    def to_dict(self) -> dict:
        d = asdict(self)
        for key, val in d.items():
            if isinstance(val, float) and not math.isfinite(val):
                d[key] = None
            elif isinstance(val, tuple):
                d[key] = [list(v) if isinstance(v, tuple) else v for v in val]
        return d


def _get(fit, name):
    v = fit.get(name) if isinstance(fit, Mapping) else getattr(fit, name, None)
    if isinstance(v, int | float) and not isinstance(v, bool):
        return float(v) if math.isfinite(v) else None
    return v


def _hz(v: float) -> str:
    return f"{v:.2f}"


def _rpm(v: float) -> str:
    return f"{v:,.0f}"


def _supported(edge: float, speeds: np.ndarray) -> bool:
    reach = SUPPORT_FRAC * edge
    return bool(np.any((speeds <= edge) & (speeds >= edge - reach)) and np.any((speeds >= edge)
                                                                               & (speeds <= edge + reach)))


def _edge_draws(fit, amp: float) -> tuple[np.ndarray, np.ndarray] | None:
    """Band edges A, B (NaN where no band) over draws of (f0, ln zeta, ln k) from the fit's covariance."""
    cov = _get(fit, "param_cov")
    f0, zeta, k = _get(fit, "f0_hz"), _get(fit, "zeta"), _get(fit, "k_per_unit")
    if cov is None or f0 is None or zeta is None or k is None:
        return None
    cov = np.asarray(cov, dtype=float)
    if cov.shape != (3, 3) or not np.all(np.isfinite(cov)):
        return None
    mean = np.array([f0, math.log(zeta), math.log(k)])
    th = np.random.default_rng(0).multivariate_normal(mean, cov, size=_DRAWS, check_valid="ignore")
    with np.errstate(over="ignore", invalid="ignore"):
        disc = (np.exp(th[:, 2]) * amp / 2.0) ** 2 - 4.0 * np.exp(th[:, 1]) ** 2
        half = np.where(disc > 0, th[:, 0] * np.sqrt(np.clip(disc, 0.0, None)), np.nan)
    return 2.0 * th[:, 0] - half, 2.0 * th[:, 0] + half


def conclusion(fit: WindowFit | Mapping[str, Any], amplitude_1x: float, speed_hz: float,
               observed_speeds_hz: Sequence[float], *, margin: float = 0.01, forcing_per_rev: float = 1.0,
               units: str = "g") -> WindowConclusion:
    """The plain conclusion of an operating-window fit at one 1X amplitude.

    Parameters
    ----------
    fit : WindowFit or its ``to_dict()``
        An operating-window fit (``f0_hz``, ``zeta``, ``k_per_unit``, ``param_cov``, ``status``).
    amplitude_1x : float
        The 1X acceleration (sine peak, in ``units``) to draw the band at, usually today's.
    speed_hz : float
        The present 1X (forcing) frequency in Hz.
    observed_speeds_hz : sequence of float
        The 1X frequencies of the readings the fit used: the band's edges are flagged as extrapolated
        where no speed within 2 % of an edge was run on one side of it.
    margin : float
        Extra safety margin beyond the 95 % interval of each edge, as a fraction of speed (0.01 = 1 %),
        for the skipped-speed range.
    forcing_per_rev : float
        1X cycles per shaft revolution (the asset's forcing multiplier), for r/min of the shaft.
    units : str
        Units of ``amplitude_1x`` (the point's acceleration units).

    Returns
    -------
    WindowConclusion
        ``text`` says it in words; ``skip_text`` gives the skipped-speed range; ``caution`` is the caution.

    References
    ----------
    Band |f - 2 f0| < f0 sqrt((k a)^2 / 4 - 4 zeta^2): Landau & Lifshitz, *Mechanics*, 3rd ed., §27;
    undamped limit a = 1 +- q of the Mathieu equation's first tongue: McLachlan, *Theory and Application
    of Mathieu Functions* (1947), ch. IV; Nayfeh & Mook, *Nonlinear Oscillations* (1979), §5.2.
    """
    if not (isinstance(margin, int | float) and 0.0 <= margin < 0.5):
        raise ValueError(f"margin must be a fraction from 0 to 0.5 of speed (0.01 = 1 %), got {margin!r}")
    if not (isinstance(forcing_per_rev, int | float) and forcing_per_rev > 0):
        raise ValueError(f"forcing_per_rev must be a positive number, got {forcing_per_rev!r}")
    speeds = np.asarray([s for s in observed_speeds_hz if s is not None and math.isfinite(s) and s > 0],
                        dtype=float)
    rpm = 60.0 / float(forcing_per_rev)
    amp = float(amplitude_1x) if amplitude_1x is not None and math.isfinite(amplitude_1x) else None
    speed = float(speed_hz) if speed_hz is not None and math.isfinite(speed_hz) else None
    fit_status = str(_get(fit, "status") or "")
    common: dict[str, Any] = dict(
        caution=CAUTION, units=units, one_x_accel_peak=amp, speed_hz=speed,
        speed_rpm=None if speed is None else speed * rpm, margin_pct=100.0 * margin, fit_status=fit_status,
        observed_hz=(float(speeds.min()), float(speeds.max())) if speeds.size else None,
        observed_ranges_hz=speed_ranges(speeds) if speeds.size else ())
    f0, zeta, k = _get(fit, "f0_hz"), _get(fit, "zeta"), _get(fit, "k_per_unit")
    if f0 is None or zeta is None or k is None or amp is None or not (f0 > 0 and zeta > 0 and k > 0
                                                                      and amp > 0):
        ac, lo, hi = (_get(fit, n) for n in ("amp_threshold", "amp_threshold_lo", "amp_threshold_hi"))
        if fit_status == "one_speed" and ac is not None and amp is not None and amp > 0 and speed is not None:
            # one speed run: no band, but the 1X threshold at that speed is measured
            ci = f" (95 % interval {lo:.3g} to {hi:.3g})" if lo is not None and hi is not None else ""
            where = "above" if amp > ac else "below"
            text = (f"All readings were taken at one speed, so no unstable speed band can be drawn. At "
                    f"{_hz(speed)} Hz the half-order line appears above a 1X acceleration of about {ac:.3g} "
                    f"{units} peak{ci}; today's {amp:.3g} {units} peak is {where} it.")
            return WindowConclusion("no_fit", False, text, **common)
        why = _get(fit, "message") or "the operating window has no fit"
        return WindowConclusion("no_fit", False, f"No plain conclusion yet: {why}.", **common)
    usable = fit_status == "fit"
    lead = "" if usable else f"Indicative only ({_get(fit, 'message') or fit_status}). "
    at = f"At today's 1X acceleration of {amp:.3g} {units} peak"
    est = _band(f0, zeta, k, amp)
    draws = _edge_draws(fit, amp)
    lo_q, hi_q = 100 * (1 - CI_LEVEL) / 2, 100 * (1 + CI_LEVEL) / 2
    prob: float | None = None
    a_ci: tuple[float, float] | None = None
    b_ci: tuple[float, float] | None = None
    if draws is not None:
        a_d, b_d = draws
        ok = np.isfinite(a_d)
        prob = float(ok.mean())
        if ok.sum() >= 0.5 * (1 - CI_LEVEL) * _DRAWS:
            pa, pb = np.percentile(a_d[ok], [lo_q, hi_q]), np.percentile(b_d[ok], [lo_q, hi_q])
            a_ci, b_ci = (float(pa[0]), float(pa[1])), (float(pb[0]), float(pb[1]))
    if est is None:
        tip = float(threshold_amplitude(2.0 * f0, f0, zeta, k))
        text = (f"{lead}{at}, the fit finds no unstable speed: the tongue's tip at {_hz(2 * f0)} Hz needs "
                f"{tip:.3g} {units} peak.")
        if a_ci is not None and b_ci is not None:
            text += (f" Within the fit's 95 % uncertainty a band from {_hz(a_ci[0])} to {_hz(b_ci[1])} Hz "
                     "cannot be ruled out.")
        skip = _skip(a_ci, b_ci, margin, forcing_per_rev)
        return WindowConclusion("stable", usable, text, inside=False, band_probability=prob,
                                band_low_ci95_hz=a_ci, band_high_ci95_hz=b_ci, **skip, **common)
    a, b = est
    known = a_ci is not None and b_ci is not None
    below = min(a_ci[0], a) if a_ci is not None else a
    above = max(b_ci[1], b) if b_ci is not None else b
    edges = "the fit states no interval for the edges"
    if a_ci is not None and b_ci is not None:
        edges = (f"95 % intervals of the edges {_hz(a_ci[0])}–{_hz(a_ci[1])} Hz and "
                 f"{_hz(b_ci[0])}–{_hz(b_ci[1])} Hz")
    inside = speed is not None and a <= speed <= b
    ext_lo = not _supported(a, speeds)
    ext_hi = not _supported(b, speeds)
    what = "speeds" if forcing_per_rev == 1 else "1X frequencies"
    shaft = "" if forcing_per_rev == 1 else f" shaft, {forcing_per_rev:g} forcing cycles per revolution"
    text = (f"{lead}{at}, {what} from {_hz(a)} to {_hz(b)} Hz ({_rpm(a * rpm)} to {_rpm(b * rpm)} "
            f"r/min{shaft})"
            f" are unstable ({edges}). The nearest stable speeds are below {_hz(below)} Hz "
            f"({_rpm(below * rpm)} r/min) or above {_hz(above)} Hz ({_rpm(above * rpm)} r/min).")
    if speed is not None:
        where = "inside the band" if inside else (f"{_hz(a - speed)} Hz below the band" if speed < a
                                                   else f"{_hz(speed - b)} Hz above the band")
        text += f" The present speed, {_hz(speed)} Hz, is {where}."
    if ext_lo or ext_hi:
        parts = [f"{_hz(lo)}–{_hz(hi)} Hz" for lo, hi in common["observed_ranges_hz"]]
        seen = " and ".join([", ".join(parts[:-1]), parts[-1]] if len(parts) > 1 else parts) or "no speed"
        which = "both edges are" if ext_lo and ext_hi else ("the lower edge is" if ext_lo
                                                            else "the upper edge is")
        text += (f" Readings were taken only at {seen}: {which} extrapolated from the model, not seen "
                 "in the data.")
    return WindowConclusion("unstable", usable, text, inside=inside, band_hz=(a, b),
                            band_rpm=(a * rpm, b * rpm),
                            band_low_ci95_hz=a_ci, band_high_ci95_hz=b_ci, band_probability=prob,
                            stable_below_hz=below, stable_above_hz=above, stable_below_rpm=below * rpm,
                            stable_above_rpm=above * rpm, extrapolated_low=ext_lo, extrapolated_high=ext_hi,
                            **(_skip(a_ci, b_ci, margin, forcing_per_rev) if known else _NO_SKIP),
                            **common)


_NO_SKIP = {"skip_text": "No skipped-speed range is proposed: the fit gives no interval for the band's "
                         "edges."}


def _skip(a_ci, b_ci, margin: float, forcing_per_rev: float) -> dict:
    """The skipped-speed range: the band's outer 95 % limits widened by ``margin`` of speed."""
    if a_ci is None or b_ci is None:
        return {}
    lo, hi = a_ci[0] * (1.0 - margin), b_ci[1] * (1.0 + margin)
    if lo <= 0 or hi - lo > MAX_SKIP_SHARE * 0.5 * (lo + hi):
        why = (f"No skipped-speed range is proposed: the 95 % interval of the band ({_hz(lo)} to "
               f"{_hz(hi)} Hz) is too wide to program; readings at more speeds would narrow it.")
        return {"skip_text": why}
    rpm = 60.0 / forcing_per_rev
    one_x = "" if forcing_per_rev == 1 else f"; 1X {_hz(lo)} to {_hz(hi)} Hz"
    text = (f"On a variable-speed drive, program a skipped (avoided) speed range from "
            f"{_hz(lo / forcing_per_rev)} to {_hz(hi / forcing_per_rev)} Hz shaft speed ({_rpm(lo * rpm)} to "
            f"{_rpm(hi * rpm)} r/min{one_x}): the unstable band's 95 % interval widened by "
            f"{100 * margin:g} % of speed on each side. A drive set in output frequency needs these shaft "
            "speeds times the motor's pole pairs, plus slip.")
    return {"skip_hz": (lo, hi), "skip_rpm": (lo * rpm, hi * rpm), "skip_text": text}
