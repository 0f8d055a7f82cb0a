"""Subharmonic search 0.30X-0.70X: CFAR test against the local floor, class, family, other tones."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from analysis.record.conditioning import velocity_mm_s
from analysis.record.forcing import line_near
from analysis.record.spectrum import cfar_threshold, grandke, local_peaks, power
from analysis.results import Precursor, Spectrum, Subharmonic, Tone

SEARCH_BAND = (0.30, 0.70)  # orders searched for a subharmonic
HALF_ORDER_TOL = 0.01  # ±2 % of 0.5X, in orders
WHIRL_BAND = (0.38, 0.48)  # fluid-film whirl, orders (common practice)
MIN_VELOCITY_MM_S = 0.02  # absolute floor (peak): below this a line is sensor noise (common practice)
MAX_TONES = 12
AMBIGUOUS_NOTE = "0.5X or whirl: take a longer reading"
#: spread of the Grandke-interpolated Hann peak frequency over the Cramér-Rao bound (measured: 1.7)
ESTIMATOR_SPREAD = 2.0
#: Scatter of the floor estimate as degrees of freedom per test-bin d.o.f.: medians of 32-bin blocks
#: (median efficiency 2/π for Gaussian-like data) of Hann bins that are correlated over ~ENBW = 1.5 bins.
FLOOR_DOF_FACTOR = 32 * (2.0 / np.pi) / 1.5


def _floor_power(spec: Spectrum) -> np.ndarray:
    return spec.floor_psd * (spec.enbw_bins * spec.df_hz)


def independent_cells(spec: Spectrum, n_bins: int) -> int:
    """Number of independent tests in a band of n_bins: adjacent Hann bins are correlated, and a band holds
    about (width / ENBW) statistically independent resolution cells."""
    return max(1, int(round(n_bins / spec.enbw_bins)))


def order_interval(spec: Spectrum, f_hz: float, f1x: float, power_ratio: float) -> tuple[float, float]:
    """Interval of orders a line measured at f_hz may stand for: ± (half the resolution bandwidth + 1.96 σ).

    The resolution bandwidth of a segment of T s is B_e = 1/T (Bendat & Piersol, *Random Data*, 4th ed.,
    §11.5, resolution of spectral estimates; from memory): a second line within about half of it is not
    separated from the first, so the measured order stands for anything in ±B_e/2. σ is the Cramér-Rao
    bound of a single tone's frequency (Rife & Boorstyn 1974, IEEE Trans. IT-20(5)): var ω ≥ 12/(η N³)
    rad²/sample² with η = A²/(2σ²) per sample; the per-bin SNR ρ of a bin of ENBW B bins is ρ = η N/(2B)
    (a sine reads A²/2, white noise 2σ²B/N), so σ_f = Δf/(2π)·√(12 / (2 B ρ)). The interpolated Hann peak
    spreads more than the bound (measured 1.7x in tests/analysis/test_short_readings.py): σ is taken as
    ``ESTIMATOR_SPREAD`` times it.
    """
    res = spec.df_hz  # fs / nperseg: one bin of an unpadded segment = its resolution bandwidth 1/T
    crlb = res / (2 * np.pi) * np.sqrt(12.0 / (2.0 * spec.enbw_bins * max(power_ratio, 1e-12)))
    sigma = ESTIMATOR_SPREAD * crlb
    half = 0.5 * res + 1.96 * sigma
    return (f_hz - half) / f1x, (f_hz + half) / f1x


def line_class(order: float, interval: tuple[float, float]) -> str | None:
    """Class of a line at ``order``: "subharmonic" when its interval reaches both the half-order window
    and the whirl band (the reading cannot tell them apart), else "half-order" / "sub-synchronous" by the
    order itself, else None (no subharmonic)."""
    lo, hi = interval
    reaches_half = lo <= 0.5 + HALF_ORDER_TOL and hi >= 0.5 - HALF_ORDER_TOL
    reaches_whirl = lo <= WHIRL_BAND[1] and hi >= WHIRL_BAND[0]
    if reaches_half and reaches_whirl:
        return "subharmonic"
    if abs(order - 0.5) <= HALF_ORDER_TOL:
        return "half-order"
    if WHIRL_BAND[0] <= order <= WHIRL_BAND[1]:
        return "sub-synchronous"
    return None


def threshold(spec: Spectrum, pfa: float, n_tested: int) -> float:
    return cfar_threshold(pfa, n_tested, spec.nu_eff, spec.nu_eff * FLOOR_DOF_FACTOR)


def _hann_leakage(d: np.ndarray) -> np.ndarray:
    """Power envelope of the Hann window's sidelobes d bins from a line (d ≥ 2), relative to the line."""
    d = np.maximum(np.abs(d), 2.0)
    return (1.0 / (np.pi * d * (d * d - 1.0))) ** 2


def _not_leakage(pw: np.ndarray, peaks: np.ndarray) -> np.ndarray:
    """Drop local maxima that are sidelobes of a stronger line (within 10× the Hann leakage envelope)."""
    order = peaks[np.argsort(pw[peaks])[::-1]]
    kept: list[int] = []
    for k in order:
        if kept:
            strong = np.asarray(kept)
            d = np.abs(strong - k).astype(float)
            near = d <= 64
            if np.any(near) and np.any(pw[k] < 10.0 * pw[strong[near]] * _hann_leakage(d[near])):
                continue
            if np.any(d < 2):
                continue
        kept.append(int(k))
    return np.asarray(kept, dtype=np.intp)


def significant_lines(
    spec: Spectrum, f1x: float, pfa: float
) -> tuple[float, list[tuple[int, float, float, float]]]:
    """CFAR test of every local maximum in 0.30X-0.70X.

    Returns (τ, [(bin, frequency, amplitude, power ratio), ...]) for the lines whose power over the local
    floor exceeds τ, the threshold for a family-wise false-alarm probability ``pfa`` over the bins searched.
    """
    pw = power(spec)
    floor = _floor_power(spec)
    df = spec.df_hz
    lo, hi = int(np.ceil(SEARCH_BAND[0] * f1x / df)), int(np.floor(SEARCH_BAND[1] * f1x / df)) + 1
    tau = threshold(spec, pfa, independent_cells(spec, hi - lo))
    out = []
    for k in local_peaks(pw, lo, hi):
        ratio = pw[k] / max(floor[k], 1e-300)
        if ratio > tau:
            f, a = grandke(pw, int(k), df)
            out.append((int(k), f, a, float(ratio)))
    return tau, out


def detect_subharmonic(
    spec: Spectrum,
    f1x: float,
    units: str,
    pfa: float,
    min_velocity_mm_s: float = MIN_VELOCITY_MM_S,
    bump_test: Callable[[int, float], Precursor | None] | None = None,
) -> Subharmonic:
    """Half-order / sub-synchronous detection.

    Significant lines in 0.30X-0.70X pass the CFAR threshold (family-wise false-alarm probability ``pfa``
    over the bins searched) and the absolute velocity floor. The strongest significant line within ±2 % of
    0.5X makes the record "half-order"; failing that, the strongest in the whirl band 0.38-0.48X makes it
    "sub-synchronous"; in a short reading (one segment) a line whose order interval (``order_interval``)
    reaches both is "subharmonic" with the note "0.5X or whirl: take a longer reading"; other
    lines (0.31X, 0.62X, ...) are no subharmonic and are listed as tones. With no
    detection the line nearest 0.5X is still measured (for trends), with class "none".

    ``bump_test(bin, frequency)`` (analysis.precursor) returns a Precursor when the half-order candidate is
    a noise-excited resonance bump rather than a line: the record is then not "half-order" (the next
    candidate class is still tried) and the bump is reported in ``precursor``.
    """
    tau, cands = significant_lines(spec, f1x, pfa)
    best: dict[str, tuple[float, float, float, float, int]] = {}
    for k, f, a, ratio in cands:
        # a short reading (one segment) may not tell 0.5X from whirl; an averaged spectrum resolves
        # f1x/50 or finer, and its classes stay those of the measured order
        span = order_interval(spec, f, f1x, ratio) if spec.n_segments == 1 else (f / f1x, f / f1x)
        klass = line_class(f / f1x, span)
        if klass is None:
            continue
        v = velocity_mm_s(a, f, units)
        if v >= min_velocity_mm_s and (klass not in best or a > best[klass][1]):
            best[klass] = (f, a, ratio, v, k)
    precursor = None
    if bump_test is not None and "half-order" in best:
        precursor = bump_test(best["half-order"][4], best["half-order"][0])
        if precursor is not None:
            del best["half-order"]
    pw = power(spec)
    floor = _floor_power(spec)
    df = spec.df_hz
    family_tau = threshold(spec, pfa, 5)
    for klass in ("half-order", "sub-synchronous", "subharmonic"):
        if klass in best:
            f, a, ratio, v, _k = best[klass]
            family = {}
            for name, mult in (("1.5X", 1.5), ("2.5X", 2.5)):
                hit = line_near(spec, pw, mult * f1x)
                ok = hit is not None and pw[hit[0]] > family_tau * floor[hit[0]]
                family[name] = hit[2] if ok else None
            return Subharmonic(
                detected=True,
                klass=klass,
                frequency_hz=f,
                order=f / f1x,
                amplitude=a,
                velocity_mm_s=v,
                snr_db=10 * np.log10(ratio),
                threshold_db=10 * np.log10(tau),
                pfa=pfa,
                family=family,
                precursor=precursor,
                order_interval=order_interval(spec, f, f1x, ratio),
                note=AMBIGUOUS_NOTE if klass == "subharmonic" else "",
            )
    hit = line_near(spec, pw, 0.5 * f1x, half_bins=max(1, int(round(HALF_ORDER_TOL * f1x / df))))
    if hit is None:
        return Subharmonic(
            detected=False,
            klass="none",
            frequency_hz=None,
            order=None,
            amplitude=None,
            velocity_mm_s=None,
            snr_db=None,
            threshold_db=10 * np.log10(tau),
            pfa=pfa,
            family={"1.5X": None, "2.5X": None},
            precursor=precursor,
        )
    k, f, a = hit
    return Subharmonic(
        detected=False,
        klass="none",
        frequency_hz=f,
        order=f / f1x,
        amplitude=a,
        velocity_mm_s=velocity_mm_s(a, f, units),
        snr_db=10 * np.log10(pw[k] / max(floor[k], 1e-300)),
        threshold_db=10 * np.log10(tau),
        pfa=pfa,
        family={"1.5X": None, "2.5X": None},
        precursor=precursor,
    )


def other_tones(spec: Spectrum, f1x: float, pfa: float, exclude_hz: list[float]) -> tuple[Tone, ...]:
    """Significant lines other than 1X, 2X and the subharmonic, strongest first (at most 12).

    Searched from 10 bins above DC to 0.9 of Nyquist; the CFAR threshold is corrected for all bins
    searched; Hann sidelobes of stronger lines are not reported as tones.
    """
    pw = power(spec)
    floor = _floor_power(spec)
    lo, hi = 10, int(0.9 * (len(pw) - 1))
    tau = threshold(spec, pfa, independent_cells(spec, hi - lo))
    peaks = local_peaks(pw, lo, hi)
    if len(peaks) == 0:
        return ()
    peaks = peaks[pw[peaks] > tau * np.maximum(floor[peaks], 1e-300)]
    if len(peaks) == 0:
        return ()
    peaks = _not_leakage(pw, peaks)
    excl = np.asarray([f / spec.df_hz for f in exclude_hz if f is not None])
    tones = []
    for k in peaks:
        if len(excl) and np.min(np.abs(excl - k)) <= 2.5:
            continue
        f, a = grandke(pw, int(k), spec.df_hz)
        tones.append(
            Tone(
                frequency_hz=f,
                order=f / f1x,
                amplitude=a,
                snr_db=10 * np.log10(pw[k] / max(floor[k], 1e-300)),
            )
        )
        if len(tones) >= MAX_TONES:
            break
    return tuple(tones)
