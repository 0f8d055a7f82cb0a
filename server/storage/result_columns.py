"""The typed columns of a ``results`` row, taken from one analysis result (one place for the mapping).

Each column names its measure: ``sub_accel_peak`` (record units, sine peak), ``sub_velocity_peak_mm_s`` and
``sub_velocity_rms_mm_s`` (peak / sqrt 2), ``one_x_*`` the same for the 1X line, ``precursor_rate_per_s``
the narrow decay rate of the 0.5X precursor bump. Charts and alarm rules read these columns, never the
JSON.
"""

from __future__ import annotations

from analysis.results import RecordAnalysis


def result_columns(analysis: RecordAnalysis) -> dict:
    """Column values of the ``results`` row for ``analysis`` (everything but ids, time and blobs)."""
    sub, one_x = analysis.subharmonic, analysis.orders.get("1X")
    pre = sub.precursor
    return dict(
        forcing_hz=_f(analysis.forcing.frequency_hz), sub_detected=bool(sub.detected), sub_class=sub.klass,
        sub_frequency_hz=_f(sub.frequency_hz), sub_accel_peak=_f(sub.amplitude),
        sub_velocity_peak_mm_s=_f(sub.velocity_mm_s), sub_velocity_rms_mm_s=_f(sub.velocity_rms_mm_s),
        sub_snr_db=_f(sub.snr_db), growth_rate_per_s=_f(analysis.growth.rate_per_s),
        overall_velocity_rms_mm_s=_f(analysis.overall.velocity_rms_mm_s), zone=analysis.overall.zone or None,
        quality_ok=bool(analysis.quality.ok),
        one_x_accel_peak=None if one_x is None else _f(one_x.amplitude),
        one_x_velocity_rms_mm_s=None if one_x is None else _f(one_x.velocity_rms_mm_s),
        precursor_rate_per_s=None if pre is None else _f(pre.narrow_rate_per_s),
    )


def _f(x) -> float | None:
    from analysis.results import _num

    return _num(x)
