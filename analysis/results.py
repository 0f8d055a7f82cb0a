"""Frozen result dataclasses of the record analysis, and their JSON-safe form."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

#: "2.0": every amplitude key names its measure (``accel_peak``, ``velocity_peak_mm_s``,
#: ``velocity_rms_mm_s``, ``zone_limits_rms_mm_s``); "1.0" results are read through
#: :func:`analysis.result_compat.upgrade_result_dict`.
ANALYSIS_VERSION = "2.0"
SQRT2 = math.sqrt(2.0)


def max_hold(x: np.ndarray, y: np.ndarray, max_points: int) -> tuple[np.ndarray, np.ndarray]:
    """Decimate (x, y) to at most max_points keeping the maximum of each bucket at its own x.

    Vectorised over buckets: the buckets are laid out as rows of one padded grid and reduced with a
    single ``argmax``, so peaks survive and no Python loop runs per bucket.
    """
    x, y = np.asarray(x), np.asarray(y)
    n = y.size
    if n <= max_points:
        return x.copy(), y.copy()
    edges = np.linspace(0, n, max_points + 1).astype(np.intp)
    starts, lengths = edges[:-1], np.diff(edges)
    grid = starts[:, None] + np.arange(lengths.max())[None, :]
    vals = np.where(grid < edges[1:, None], y[np.minimum(grid, n - 1)], -np.inf)
    idx = starts + np.argmax(vals, axis=1)
    return x[idx], y[idx]


def _num(x: float | None) -> float | None:
    """A JSON-safe float: None for missing, NaN or infinite values."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass(frozen=True)
class Spectrum:
    """Calibrated one-sided amplitude spectrum of the acceleration (Hann-windowed Welch average).

    ``amplitude`` reads the peak amplitude of a sine in the input units; ``psd`` is the density in
    units²/Hz; ``floor_psd`` the robust local noise floor (mean-equivalent) in the same units.
    """

    freqs_hz: np.ndarray
    amplitude: np.ndarray
    psd: np.ndarray
    floor_psd: np.ndarray
    df_hz: float
    nperseg: int
    n_segments: int
    nu_eff: float
    enbw_bins: float

    def chart(self, max_points: int = 2048) -> tuple[np.ndarray, np.ndarray]:
        """Decimate for a chart keeping peaks: the maximum of each bucket, at its own frequency."""
        return max_hold(self.freqs_hz, self.amplitude, max_points)


@dataclass(frozen=True)
class Forcing:
    frequency_hz: float
    source: str  # "given" | "refined" | "nominal" (refinement found no line near the nominal speed)
    nominal_hz: float | None
    spread_hz: float | None = None  # max - min of the per-segment 1X frequency (speed wander)
    #: order tracking (analysis.orders): "none" | "phase" (shaft angle from the record) | "tach" (pulses);
    #: when tracked, frequency_hz is the mean speed and lines are measured in orders of the shaft angle
    tracking: str = "none"
    speed_min_hz: float | None = None  # lowest and highest 1X within the record (tracked records)
    speed_max_hz: float | None = None

    def to_dict(self) -> dict:
        return {
            "frequency_hz": _num(self.frequency_hz),
            "source": self.source,
            "nominal_hz": _num(self.nominal_hz),
            "spread_hz": _num(self.spread_hz),
            "tracking": self.tracking,
            "speed_min_hz": _num(self.speed_min_hz),
            "speed_max_hz": _num(self.speed_max_hz),
        }


@dataclass(frozen=True)
class Tone:
    frequency_hz: float
    order: float
    amplitude: float
    snr_db: float

    def to_dict(self) -> dict:
        return {
            "frequency_hz": _num(self.frequency_hz),
            "order": _num(self.order),
            "accel_peak": _num(self.amplitude),
            "snr_db": _num(self.snr_db),
        }


@dataclass(frozen=True)
class Precursor:
    """A noise-excited resonance bump near 0.5X (below threshold): not a line, but the early warning.

    ``width_hz`` is the half-power width (window main lobe removed when resolved), ``narrow_rate_per_s`` the
    narrow decay rate γ− = π·width (or the two-Lorentzian fit's), ``ratio_to_threshold`` h/h_c from the
    two-Lorentzian fit when the bump is resolved. ``coherence`` is the phase coherence of the component
    across the record and ``line_coherence`` what a steady line would give in the same noise.
    """

    frequency_hz: float
    order: float
    width_hz: float | None
    narrow_rate_per_s: float | None
    ratio_to_threshold: float | None
    ratio_to_threshold_se: float | None
    coherence: float
    line_coherence: float
    resolved: bool
    evidence: str  # "width" | "coherence"
    note: str = ""

    def to_dict(self) -> dict:
        r = self.ratio_to_threshold
        return {
            "frequency_hz": _num(self.frequency_hz),
            "order": _num(self.order),
            "width_hz": _num(self.width_hz),
            "narrow_rate_per_s": _num(self.narrow_rate_per_s),
            "ratio_to_threshold": _num(r),
            "ratio_to_threshold_se": _num(self.ratio_to_threshold_se),
            "threshold_pct": _num(None if r is None else 100.0 * r),
            "coherence": _num(self.coherence),
            "line_coherence": _num(self.line_coherence),
            "resolved": bool(self.resolved),
            "evidence": self.evidence,
            "note": self.note,
        }


@dataclass(frozen=True)
class Subharmonic:
    """The strongest line in 0.30X-0.70X: ``amplitude`` is its acceleration peak (record units),
    ``velocity_mm_s`` its velocity peak in mm/s (JSON: ``accel_peak``, ``velocity_peak_mm_s``)."""

    detected: bool
    klass: str  # "half-order" | "sub-synchronous" | "subharmonic" (a short reading: either) | "none"
    frequency_hz: float | None
    order: float | None
    amplitude: float | None
    velocity_mm_s: float | None
    snr_db: float | None
    threshold_db: float
    pfa: float
    family: dict[str, float | None] = field(default_factory=dict)
    precursor: Precursor | None = None  # a noise-excited bump at 0.5X that was not taken for a line
    #: which spectrum detected the line: "average" | "last-segments" | "whole-record" (0.5X look, 1X given)
    spectrum: str = "average"
    #: orders the measured line may stand for (± half the resolution bandwidth + 1.96 σ; analysis.detect)
    order_interval: tuple[float | None, float | None] = (None, None)
    note: str = ""  # e.g. "0.5X or whirl: take a longer reading" for class "subharmonic"

    @property
    def velocity_rms_mm_s(self) -> float | None:
        """r.m.s. velocity of the line (a sine): peak / sqrt 2, the measure of the ISO 20816 zones."""
        return None if self.velocity_mm_s is None else self.velocity_mm_s / SQRT2

    def to_dict(self) -> dict:
        return {
            "detected": bool(self.detected),
            "class": self.klass,
            "frequency_hz": _num(self.frequency_hz),
            "order": _num(self.order),
            "accel_peak": _num(self.amplitude),
            "velocity_peak_mm_s": _num(self.velocity_mm_s),
            "velocity_rms_mm_s": _num(self.velocity_rms_mm_s),
            "snr_db": _num(self.snr_db),
            "threshold_db": _num(self.threshold_db),
            "pfa": _num(self.pfa),
            "family": {k: _num(v) for k, v in self.family.items()},
            "precursor": None if self.precursor is None else self.precursor.to_dict(),
            "spectrum": self.spectrum,
            "order_interval": [_num(v) for v in self.order_interval],
            "note": self.note,
        }


@dataclass(frozen=True)
class Growth:
    rate_per_s: float | None
    ci95_per_s: tuple[float | None, float | None]
    onset_s: float | None
    state: str  # "growing" | "steady" | "decaying" | "not-estimated"
    intercept: float | None
    fit_window_s: tuple[float | None, float | None]
    band_hz: tuple[float | None, float | None] = (None, None)
    n_points: int = 0
    note: str = ""
    end_amplitude: float | None = None  # fitted envelope (peak, input units) at the end of the fit window
    #: envelope model the rate comes from: "flat" | "exponential" | "change-point" | "change-point-levelling"
    #: ("" for results made before models were compared); chosen by BIC (analysis.growth_onset)
    model: str = ""
    onset_ci95_s: tuple[float | None, float | None] = (None, None)  # change-point models only
    level_off_s: float | None = None  # levelling model: where the slope has fallen to half its initial value

    @property
    def doubling_time_s(self) -> float | None:
        """ln 2 / λ for a growing line."""
        if self.state != "growing" or not self.rate_per_s:
            return None
        return math.log(2.0) / self.rate_per_s

    def to_dict(self) -> dict:
        return {
            "rate_per_s": _num(self.rate_per_s),
            "doubling_time_s": _num(self.doubling_time_s),
            "end_accel_peak": _num(self.end_amplitude),
            "ci95_per_s": [_num(v) for v in self.ci95_per_s],
            "onset_s": _num(self.onset_s),
            "state": self.state,
            "intercept": _num(self.intercept),
            "fit_window_s": [_num(v) for v in self.fit_window_s],
            "band_hz": [_num(v) for v in self.band_hz],
            "n_points": int(self.n_points),
            "note": self.note,
            "model": self.model,
            "model_criterion": "BIC" if self.model else "",
            "onset_ci95_s": [_num(v) for v in self.onset_ci95_s],
            "level_off_s": _num(self.level_off_s),
        }


@dataclass(frozen=True)
class Overall:
    velocity_rms_mm_s: float
    zone: str
    band_hz: tuple[float, float]
    machine_group: int
    foundation: str
    zone_limits_mm_s: tuple[float, float, float]
    standard: str

    def to_dict(self) -> dict:
        return {
            "velocity_rms_mm_s": _num(self.velocity_rms_mm_s),
            "zone": self.zone,
            "band_hz": [_num(v) for v in self.band_hz],
            "machine_group": int(self.machine_group),
            "foundation": self.foundation,
            "zone_limits_rms_mm_s": [_num(v) for v in self.zone_limits_mm_s],
            "standard": self.standard,
        }


@dataclass(frozen=True)
class OrderLine:
    """One order line: ``amplitude`` is the acceleration peak (record units), ``velocity_mm_s`` the velocity
    peak in mm/s."""

    frequency_hz: float | None
    amplitude: float | None
    velocity_mm_s: float | None

    @property
    def velocity_rms_mm_s(self) -> float | None:
        """r.m.s. velocity of the line (a sine): peak / sqrt 2, the measure of the ISO 20816 zones."""
        return None if self.velocity_mm_s is None else self.velocity_mm_s / SQRT2

    def to_dict(self) -> dict:
        return {
            "frequency_hz": _num(self.frequency_hz),
            "accel_peak": _num(self.amplitude),
            "velocity_peak_mm_s": _num(self.velocity_mm_s),
            "velocity_rms_mm_s": _num(self.velocity_rms_mm_s),
        }


@dataclass(frozen=True)
class Waveform:
    rms: float
    peak: float
    crest_factor: float | None
    kurtosis: float | None  # Pearson kurtosis: 3 for Gaussian noise, 1.5 for a sine

    def to_dict(self) -> dict:
        return {
            "accel_rms": _num(self.rms),
            "accel_peak": _num(self.peak),
            "crest_factor": _num(self.crest_factor),
            "kurtosis": _num(self.kurtosis),
        }


@dataclass(frozen=True)
class Quality:
    ok: bool
    flags: tuple[str, ...]
    #: plain statements about the reading, e.g. what a short reading's resolution cannot separate
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return {"ok": bool(self.ok), "flags": list(self.flags), "notes": list(self.notes)}


@dataclass(frozen=True)
class RecordAnalysis:
    """Everything ``analyze_record`` finds in one record."""

    sample_rate_hz: float
    n_samples: int
    units: str
    forcing: Forcing
    subharmonic: Subharmonic
    growth: Growth
    overall: Overall
    orders: dict[str, OrderLine]
    waveform: Waveform
    tones: tuple[Tone, ...]
    quality: Quality
    spectrum: Spectrum
    envelope_t_s: np.ndarray
    envelope: np.ndarray
    version: str = ANALYSIS_VERSION

    @property
    def duration_s(self) -> float:
        return self.n_samples / self.sample_rate_hz

    def chart_spectrum(self, max_points: int = 2048) -> tuple[np.ndarray, np.ndarray]:
        """(freqs_hz, amplitude) decimated for charts with max-hold per bucket, so peaks survive."""
        return self.spectrum.chart(max_points)

    def envelope_chart(self, max_points: int = 2000) -> tuple[np.ndarray, np.ndarray]:
        """(t_s, envelope) of the subharmonic band (input units, peak), max-hold decimated."""
        return max_hold(self.envelope_t_s, self.envelope, max_points)

    @classmethod
    def from_dict(cls, data: dict) -> RecordAnalysis:
        """Read a stored ``to_dict()`` of any version back (see :mod:`analysis.result_compat`)."""
        from analysis.result_compat import record_analysis_from_dict

        return record_analysis_from_dict(data)

    def to_dict(self) -> dict:
        return {
            "version": self.version,
            "sample_rate_hz": _num(self.sample_rate_hz),
            "n_samples": int(self.n_samples),
            "duration_s": _num(self.duration_s),
            "units": self.units,
            "forcing": self.forcing.to_dict(),
            "subharmonic": self.subharmonic.to_dict(),
            "growth": self.growth.to_dict(),
            "overall": self.overall.to_dict(),
            "orders": {k: v.to_dict() for k, v in self.orders.items()},
            "waveform": self.waveform.to_dict(),
            "tones": [t.to_dict() for t in self.tones],
            "quality": self.quality.to_dict(),
            "spectrum_summary": {
                "df_hz": _num(self.spectrum.df_hz),
                "n_segments": int(self.spectrum.n_segments),
                "nu_eff": _num(self.spectrum.nu_eff),
            },
        }
