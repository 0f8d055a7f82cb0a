"""The first-order damped Mathieu tongue in (1X frequency, 1X amplitude): the one home of its formulas.

Model (first-order damped Mathieu, Landau & Lifshitz, Mechanics §27): the 1X amplitude a sets the
modulation depth h = k a; at 1X frequency f the threshold is h_c(f) = 2 sqrt(((f - 2 f0) / f0)^2 + 4 zeta^2),
so the amplitude threshold is a_c(f) = h_c(f) / k, the unstable band at amplitude a is
|f - 2 f0| < f0 sqrt((k a)^2 / 4 - 4 zeta^2), and the growth rate is
lambda = -zeta w0 + 1/2 sqrt((k a w0 / 2)^2 - (2 pi (f - 2 f0))^2).
Imported by the fit (analysis.window_fit), the conclusion (analysis.window) and the simulator.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["band", "growth_rate", "threshold_amplitude", "threshold_margin"]


def threshold_amplitude(f, f0, zeta, k):
    """The 1X amplitude threshold of the first-order damped Mathieu tongue (the one home of a_c(f)).

    Parameters
    ----------
    f : float or array_like
        1X (forcing) frequency in Hz.
    f0 : float
        Natural frequency of the subharmonic mode in Hz.
    zeta : float
        Damping ratio of that mode.
    k : float
        Modulation depth per unit of 1X amplitude (h = k a).

    Returns
    -------
    float or ndarray
        a_c(f) = 2 sqrt(((f - 2 f0) / f0)^2 + 4 zeta^2) / k, in the units of the 1X amplitude.

    References
    ----------
    L. D. Landau and E. M. Lifshitz, *Mechanics*, 3rd ed., §27 (parametric resonance, with friction).
    """
    return 2.0 * np.sqrt(((np.asarray(f, dtype=float) - 2.0 * f0) / f0) ** 2 + 4.0 * zeta**2) / k


def threshold_margin(speed_hz: float, amp_1x: float, f0: float, zeta: float, k: float) -> float | None:
    """Margin to the instability threshold, ``1 - a_1X / a_c(f)``.

    Parameters
    ----------
    speed_hz, amp_1x : float
        Today's 1X frequency (Hz) and 1X amplitude (the fit's units).
    f0, zeta, k : float
        Parameters of an operating-window fit (see :func:`threshold_amplitude`).

    Returns
    -------
    float or None
        1 far from the threshold, 0 on it, negative beyond it; ``None`` when an input is missing,
        not finite or not positive.
    """
    vals = (speed_hz, amp_1x, f0, zeta, k)
    if not all(isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v) for v in vals):
        return None
    if not (f0 > 0 and zeta > 0 and k > 0):
        return None
    a_c = float(threshold_amplitude(speed_hz, f0, zeta, k))
    return 1.0 - amp_1x / a_c if a_c > 0 else None


def growth_rate(f, a, f0, zeta, k):
    """Net growth rate (1/s) at 1X frequency f (Hz) and 1X amplitude a; negative outside the tongue."""
    w0 = 2.0 * math.pi * f0
    eps = 2.0 * math.pi * (f - 2.0 * f0)
    disc = (k * a * w0 / 2.0) ** 2 - eps**2
    return -zeta * w0 + 0.5 * np.sqrt(np.clip(disc, 0.0, None))


def band(f0, zeta, k, amp):
    """The unstable 1X frequency band (Hz) at 1X amplitude ``amp``; None below the tongue's tip."""
    disc = (k * amp / 2.0) ** 2 - 4.0 * zeta**2
    if disc <= 0:
        return None
    half = f0 * math.sqrt(disc)
    return (2.0 * f0 - half, 2.0 * f0 + half)
