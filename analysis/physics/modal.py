"""Natural frequency and damping of the subharmonic mode from records taken below threshold.

Below threshold the randomly excited mode shows as a broad bump near 0.5X. Two estimates:

* ``fit_mode``: half-power bandwidth as the start (zeta ~ (f2 - f1) / (2 f_n), a textbook relation, e.g.
  Ewins, *Modal Testing*), then a least-squares fit of the single-degree-of-freedom response to white
  force, S(f) = D / ((w_n^2 - w^2)^2 + (2 zeta w_n w)^2) + c (a Lorentzian near the peak), relative weights,
  to the displacement-like PSD. Standard errors from the fit covariance. Needs about 8 PSD bins per
  half-power bandwidth (the result says when it has fewer).
* ``fit_precursor``: with the pump (1X) on but below threshold the peak at exactly f_W/2 is the sum of two
  Lorentzians of decay rates g- = zeta w0 - s_par and g+ = zeta w0 + s_par (methods note 6.2; noisy
  precursor of period doubling, Wiesenfeld 1985), so zeta w0 = (g- + g+) / 2 and
  h/h_c = (g+ - g-) / (g+ + g-).

Both take a one-sided PSD (freqs_hz, psd); ``psd_of_record`` makes one from acceleration samples with scipy's
Welch estimator and converts it to displacement-like units (divides by (2 pi f)^4).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from scipy import optimize, signal

__all__ = ["ModeFit", "PrecursorFit", "fit_mode", "fit_precursor", "half_power", "psd_of_record"]

TWO_PI = 2.0 * math.pi


def psd_of_record(samples, fs_hz: float, *, segment_s: float, displacement: bool = True):
    """Welch PSD (Hann, 50 % overlap, density) of an acceleration record; (freqs_hz, psd, averages)."""
    x = np.asarray(samples, dtype=float).ravel()
    if not (fs_hz > 0 and math.isfinite(fs_hz)):
        raise ValueError(f"fs_hz must be a positive number, got {fs_hz!r}")
    nper = int(round(segment_s * fs_hz))
    if nper < 16 or nper > x.size:
        raise ValueError(f"segment_s={segment_s:g} gives {nper} samples per segment; the record has {x.size}")
    f, p = signal.welch(x, fs=fs_hz, window="hann", nperseg=nper, noverlap=nper // 2, detrend="constant")
    averages = 1 + (x.size - nper) // (nper - nper // 2)
    if displacement:
        with np.errstate(divide="ignore"):
            p = np.where(f > 0, p / (TWO_PI * f) ** 4, 0.0)
    return f, p, averages


def _band(freqs, psd, band_hz):
    f = np.asarray(freqs, dtype=float)
    p = np.asarray(psd, dtype=float)
    if f.shape != p.shape or f.ndim != 1:
        raise ValueError("freqs_hz and psd must be 1-D arrays of the same length")
    lo, hi = band_hz
    sel = (f >= lo) & (f <= hi) & np.isfinite(p) & (p > 0)
    if sel.sum() < 8:
        raise ValueError(f"band {lo:g}-{hi:g} Hz holds {int(sel.sum())} usable PSD bins; need at least 8")
    return f[sel], p[sel]


def half_power(freqs_hz, psd, band_hz: tuple[float, float]) -> tuple[float, float, float]:
    """Peak frequency, half-power bandwidth (interpolated -3 dB crossings) and the zeta estimate."""
    f, p = _band(freqs_hz, psd, band_hz)
    i = int(np.argmax(p))
    half = p[i] / 2.0
    left = i
    while left > 0 and p[left] > half:
        left -= 1
    right = i
    while right < p.size - 1 and p[right] > half:
        right += 1
    if p[left] > half or p[right] > half:
        raise ValueError("the peak does not fall to half power inside the band; widen band_hz")
    f1 = f[left] + (half - p[left]) * (f[left + 1] - f[left]) / (p[left + 1] - p[left])
    f2 = f[right - 1] + (half - p[right - 1]) * (f[right] - f[right - 1]) / (p[right] - p[right - 1])
    bw = float(f2 - f1)
    return float(f[i]), bw, bw / (2.0 * float(f[i]))


@dataclass(frozen=True)
class ModeFit:
    """Single-mode estimate: frequency, damping, their standard errors, and the half-power start."""

    f0_hz: float
    f0_hz_se: float
    zeta: float
    zeta_se: float
    decay_rate_per_s: float
    half_power_zeta: float
    bins_per_bandwidth: float
    message: str

    to_dict = asdict


def _sdof(f, d, fn, zeta, c):
    w, wn = TWO_PI * f, TWO_PI * fn
    return d / ((wn * wn - w * w) ** 2 + (2.0 * zeta * wn * w) ** 2) + c


def fit_mode(freqs_hz, psd, *, band_hz: tuple[float, float]) -> ModeFit:
    """Least-squares single-mode fit of a displacement-like PSD in ``band_hz`` (half-power start)."""
    f, p = _band(freqs_hz, psd, band_hz)
    fp, bw, z_hp = half_power(freqs_hz, psd, band_hz)
    c0 = float(np.min(p))
    wn = TWO_PI * fp
    d0 = (float(np.max(p)) - c0) * (2.0 * z_hp * wn * wn) ** 2
    popt, pcov = optimize.curve_fit(
        _sdof,
        f,
        p,
        p0=[d0, fp, z_hp, c0],
        sigma=p,
        maxfev=20000,
        bounds=([0, f[0], 1e-6, 0], [np.inf, f[-1], 0.5, np.inf]),
    )
    _, fn, zeta, _ = popt
    se = np.sqrt(np.clip(np.diag(pcov), 0.0, None))
    bins = 2.0 * zeta * fn / float(f[1] - f[0])
    msg = (
        "ok"
        if bins >= 8
        else (
            f"only {bins:.1f} PSD bins per half-power bandwidth (8 or more wanted): "
            "zeta is biased high; use longer Welch segments"
        )
    )
    return ModeFit(
        float(fn), float(se[1]), float(zeta), float(se[2]), float(zeta * TWO_PI * fn), z_hp, float(bins), msg
    )


@dataclass(frozen=True)
class PrecursorFit:
    """Two-Lorentzian fit at f_W/2 below threshold: the narrow and broad decay rates and h/h_c."""

    narrow_rate_per_s: float
    broad_rate_per_s: float
    decay_rate_per_s: float
    ratio_to_threshold: float
    ratio_to_threshold_se: float
    margin_pct: float

    to_dict = asdict


def _two_lorentz(nu, d, gm, gp, c):
    w2 = (TWO_PI * nu) ** 2
    return d * (1.0 / (gm * gm + w2) + 1.0 / (gp * gp + w2)) + c


def fit_precursor(freqs_hz, psd, *, forcing_hz: float, half_width_hz: float) -> PrecursorFit:
    """Fit S(nu) = D [1/(g-^2 + (2 pi nu)^2) + 1/(g+^2 + (2 pi nu)^2)] + c, nu = f - f_W/2 (tuned model)."""
    centre = forcing_hz / 2.0
    f, p = _band(freqs_hz, psd, (centre - half_width_hz, centre + half_width_hz))
    nu = f - centre
    _, bw, _ = half_power(freqs_hz, psd, (centre - half_width_hz, centre + half_width_hz))
    g_single = math.pi * bw
    c0 = float(np.min(p))
    best = None
    for split in (0.3, 0.6, 0.9):  # a few starts: narrow part from the half-power width, broad part wider
        gm, gp = g_single * (1 - split / 2), g_single * (1 + 3 * split)
        d0 = (float(np.max(p)) - c0) / (1 / gm**2 + 1 / gp**2)
        try:
            popt, pcov = optimize.curve_fit(
                _two_lorentz,
                nu,
                p,
                p0=[d0, gm, gp, c0],
                sigma=p,
                maxfev=20000,
                bounds=([0, 1e-9, 1e-9, 0], [np.inf] * 4),
            )
        except RuntimeError:
            continue
        cost = float(np.sum(((_two_lorentz(nu, *popt) - p) / p) ** 2))
        if best is None or cost < best[0]:
            best = (cost, popt, pcov)
    if best is None:
        raise ValueError("the two-Lorentzian fit did not converge; check the band and the PSD resolution")
    _, popt, pcov = best
    _, gm, gp, _ = popt
    if gm > gp:
        gm, gp = gp, gm
        pcov = pcov[[0, 2, 1, 3]][:, [0, 2, 1, 3]]
    s = gm + gp
    ratio = (gp - gm) / s
    # delta method for r = (g+ - g-) / (g+ + g-): dr/dg- = -2 g+ / s^2, dr/dg+ = 2 g- / s^2
    grad = np.array([-2 * gp / s**2, 2 * gm / s**2])
    var = float(grad @ pcov[1:3, 1:3] @ grad)
    return PrecursorFit(
        float(gm), float(gp), float(s / 2), float(ratio), math.sqrt(max(var, 0.0)), float(100 * (1 - ratio))
    )
