"""Known-location look at 0.5X on the whole record: one Hann periodogram at full resolution.

When 1X is known (given by a tachometer or the drive), the half-order line can only lie at 0.5X ± 2 %. A
steady line of peak A gains 10·log10(T / T_seg) dB of per-bin SNR in a periodogram of the whole record of
length T over one Welch segment of length T_seg (its bin's ENBW is 1.5/T Hz for Hann), against the higher
threshold of a single periodogram (2 degrees of freedom, no averaging): near the detection limit of short
and medium records this look finds lines the averaged spectrum misses (methods: Kay 1998, *Fundamentals of
Statistical Signal Processing, vol. II: Detection Theory*, the detector for a sinusoid of known frequency
and unknown amplitude and phase, whose statistic is the periodogram at that frequency).

The test: the periodogram (zero-padded ×2, so a line between bins loses at most ~0.4 dB instead of the
1.42 dB Hann scalloping) over the floor density of the averaged spectrum times the bin's ENBW; the ratio is
F(2, ν_floor) under noise alone (the floor estimate's own scatter, as in analysis.detect), with the per-look
false-alarm probability spread over the resolution cells of the ±2 % band (Šidák). A floor that the record
itself shows 3 dB higher around 0.5X (a noise-excited resonance bump, which the averaged look reports as a
precursor) replaces the broadband one, so a bump is not taken for a line.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft

from analysis.record.conditioning import velocity_mm_s
from analysis.record.detect import FLOOR_DOF_FACTOR, HALF_ORDER_TOL, MIN_VELOCITY_MM_S
from analysis.record.spectrum import cfar_threshold, grandke, hann
from analysis.results import Spectrum, Subharmonic

PAD = 2  # zero-padding factor of the whole-record periodogram
RING_BINS = (4, 24)  # bins (unpadded) either side of the band for the local floor check
RING_RAISE = 2.0  # the local floor replaces the broadband one when it is 3 dB higher


def whole_record_look(
    x: np.ndarray,
    fs: float,
    spec: Spectrum,
    f1x: float,
    units: str,
    pfa: float,
    min_velocity_mm_s: float = MIN_VELOCITY_MM_S,
) -> Subharmonic:
    """Half-order test at 0.5X ± 2 % on one periodogram of the whole record, false-alarm probability pfa.

    Returns a detected half-order Subharmonic (``spectrum="whole-record"``) or an undetected one.
    """
    n = len(x)
    w = hann(n)
    s1 = float(np.sum(w))
    enbw_hz = 1.5 * fs / n
    nfft = PAD * n
    xw = (x - x.mean()) * w
    band = (0.5 - HALF_ORDER_TOL) * f1x, (0.5 + HALF_ORDER_TOL) * f1x
    df_pad = fs / nfft
    k_lo = max(1, int(np.floor(band[0] / df_pad)))
    k_hi = min(nfft // 2 - 1, int(np.ceil(band[1] / df_pad)))
    ring = RING_BINS[1] * PAD
    j_lo, j_hi = max(1, k_lo - ring), min(nfft // 2 - 1, k_hi + ring)
    # only the bins near 0.5X are needed: a real FFT of the zero-padded record
    spec_x = sfft.rfft(xw, n=nfft)[j_lo : j_hi + 1]
    pw = 2.0 * (spec_x.real**2 + spec_x.imag**2) / (s1 * s1)  # A²/2 for a bin-centred sine of peak A
    freqs = (np.arange(j_lo, j_hi + 1)) * df_pad
    floor_density = float(np.interp(0.5 * f1x, spec.freqs_hz, spec.floor_psd))
    floor = floor_density * enbw_hz
    # local floor from the ring around the band (unpadded bins only: every PAD-th), median of exponential
    # bins = ln 2 × their mean
    inner = RING_BINS[0] * PAD
    sel = np.r_[np.arange(0, max(0, k_lo - inner - j_lo)), np.arange(k_hi + inner - j_lo + 1, len(pw))]
    sel = sel[(sel + j_lo) % PAD == 0]
    if len(sel) >= 8:
        local = float(np.median(pw[sel])) / np.log(2.0)
        if local > RING_RAISE * floor:  # clearly above the broadband floor: a bump, not scatter
            floor = local
    cells = max(1, int(np.ceil((band[1] - band[0]) / enbw_hz)))
    tau = cfar_threshold(pfa, cells, 2.0, spec.nu_eff * FLOOR_DOF_FACTOR)
    b0, b1 = k_lo - j_lo, k_hi - j_lo
    k = b0 + int(np.argmax(pw[b0 : b1 + 1]))
    ratio = float(pw[k] / max(floor, 1e-300))
    # frequency and amplitude from the unpadded bins around the peak (Grandke), as the averaged look
    k_un = int(round(freqs[k] * n / fs))
    p_un = pw[(np.arange(k_un - 1, k_un + 2) * PAD - j_lo).clip(0, len(pw) - 1)]
    if p_un[1] >= max(p_un[0], p_un[2]):
        f_rel, a = grandke(p_un, 1, fs / n)
        f = f_rel + (k_un - 1) * fs / n
    else:
        f, a = float(freqs[k]), float(np.sqrt(2.0 * pw[k]))
    v = velocity_mm_s(a, f, units)
    detected = ratio > tau and v is not None and v >= min_velocity_mm_s
    return Subharmonic(
        detected=bool(detected),
        klass="half-order" if detected else "none",
        frequency_hz=f,
        order=f / f1x,
        amplitude=a,
        velocity_mm_s=v,
        snr_db=10 * np.log10(max(ratio, 1e-300)),
        threshold_db=10 * np.log10(tau),
        pfa=pfa,
        family={"1.5X": None, "2.5X": None},
        spectrum="whole-record",
    )
