"""Read stored analysis results back: old key names to new ones, and the dict to the typed result.

Results carry a ``version``. Version "1.0" named amplitudes without their measure (``amplitude``,
``velocity_mm_s`` were sine peaks, ``zone_limits_mm_s`` velocity r.m.s.); version "2.0" says it in
every key. :func:`upgrade_result_dict` maps a 1.0 dict to 2.0 keys (a 2.0 dict passes unchanged), and
:func:`record_analysis_from_dict` builds the frozen :class:`~analysis.results.RecordAnalysis` from
either. The spectrum and envelope arrays are not part of the JSON; they come back empty.
"""

from __future__ import annotations

import copy
import math

import numpy as np

from analysis.results import (
    ANALYSIS_VERSION,
    SQRT2,
    Forcing,
    Growth,
    OrderLine,
    Overall,
    Precursor,
    Quality,
    RecordAnalysis,
    Spectrum,
    Subharmonic,
    Tone,
    Waveform,
)

# (section, old key, new key) for a version 1.0 result
_RENAMES_V1 = (
    ("subharmonic", "amplitude", "accel_peak"),
    ("subharmonic", "velocity_mm_s", "velocity_peak_mm_s"),
    ("growth", "end_amplitude", "end_accel_peak"),
    ("overall", "zone_limits_mm_s", "zone_limits_rms_mm_s"),
    ("waveform", "rms", "accel_rms"),
    ("waveform", "peak", "accel_peak"),
)
_LINE_RENAMES_V1 = (("amplitude", "accel_peak"), ("velocity_mm_s", "velocity_peak_mm_s"))


def _rms(peak):
    return None if not isinstance(peak, int | float) or not math.isfinite(peak) else peak / SQRT2


def _rename(section: object, old: str, new: str) -> None:
    if isinstance(section, dict) and old in section and new not in section:
        section[new] = section.pop(old)


def upgrade_result_dict(data: dict) -> dict:
    """A copy of a stored result dict with version 2.0 keys (every amplitude names its measure).

    Parameters
    ----------
    data : dict
        ``RecordAnalysis.to_dict()`` of any version (a missing version counts as "1.0").

    Returns
    -------
    dict
        The same numbers under version 2.0 keys, with the r.m.s. velocities of lines added
        (peak / sqrt 2, for a sine). A 2.0 dict is returned itself; an older one is copied first.
    """
    if not isinstance(data, dict):
        return {}
    if str(data.get("version") or "1.0").split(".")[0] != "1":
        return data  # already 2.0 keys: returned as is, not copied
    out = copy.deepcopy(data)
    for section, old, new in _RENAMES_V1:
        _rename(out.get(section), old, new)
    lines = [out.get("subharmonic")] + list((out.get("orders") or {}).values())
    for line in lines:
        if not isinstance(line, dict):
            continue
        for old, new in _LINE_RENAMES_V1:
            _rename(line, old, new)
        if "velocity_peak_mm_s" in line and "velocity_rms_mm_s" not in line:
            line["velocity_rms_mm_s"] = _rms(line["velocity_peak_mm_s"])
    for tone in out.get("tones") or []:
        _rename(tone, "amplitude", "accel_peak")
    out["version"] = "2.0"
    out["upgraded_from"] = data.get("version") or "1.0"
    return out


def _f(x, default=math.nan) -> float:
    return default if x is None else float(x)


def _pair(v) -> tuple:
    v = list(v or (None, None))
    return (v[0], v[1]) if len(v) == 2 else (None, None)


def _precursor(p: dict | None) -> Precursor | None:
    if not p:
        return None
    return Precursor(frequency_hz=_f(p.get("frequency_hz")), order=_f(p.get("order")),
                     width_hz=p.get("width_hz"), narrow_rate_per_s=p.get("narrow_rate_per_s"),
                     ratio_to_threshold=p.get("ratio_to_threshold"),
                     ratio_to_threshold_se=p.get("ratio_to_threshold_se"), coherence=_f(p.get("coherence")),
                     line_coherence=_f(p.get("line_coherence")), resolved=bool(p.get("resolved")),
                     evidence=p.get("evidence") or "", note=p.get("note") or "")


def record_analysis_from_dict(data: dict) -> RecordAnalysis:
    """The typed result from a stored dict of version 1.0 or 2.0.

    Parameters
    ----------
    data : dict
        ``RecordAnalysis.to_dict()`` output, as stored by the server.

    Returns
    -------
    RecordAnalysis
        With empty spectrum and envelope arrays (the JSON does not carry them) and the version the
        result was made with.
    """
    d = upgrade_result_dict(data)
    fo, sub, g, o = (d.get(k) or {} for k in ("forcing", "subharmonic", "growth", "overall"))
    wf, q, ss = (d.get(k) or {} for k in ("waveform", "quality", "spectrum_summary"))
    empty = np.zeros(0)
    return RecordAnalysis(
        sample_rate_hz=_f(d.get("sample_rate_hz")), n_samples=int(d.get("n_samples") or 0),
        units=d.get("units") or "",
        forcing=Forcing(frequency_hz=_f(fo.get("frequency_hz")), source=fo.get("source") or "",
                        nominal_hz=fo.get("nominal_hz"), spread_hz=fo.get("spread_hz"),
                        tracking=fo.get("tracking") or "none", speed_min_hz=fo.get("speed_min_hz"),
                        speed_max_hz=fo.get("speed_max_hz")),
        subharmonic=Subharmonic(
            detected=bool(sub.get("detected")), klass=sub.get("class") or "none",
            frequency_hz=sub.get("frequency_hz"), order=sub.get("order"), amplitude=sub.get("accel_peak"),
            velocity_mm_s=sub.get("velocity_peak_mm_s"), snr_db=sub.get("snr_db"),
            threshold_db=_f(sub.get("threshold_db")), pfa=_f(sub.get("pfa")),
            family=dict(sub.get("family") or {}), precursor=_precursor(sub.get("precursor")),
            spectrum=sub.get("spectrum") or "average", order_interval=_pair(sub.get("order_interval")),
            note=sub.get("note") or ""),
        growth=Growth(rate_per_s=g.get("rate_per_s"), ci95_per_s=_pair(g.get("ci95_per_s")),
                      onset_s=g.get("onset_s"), state=g.get("state") or "not-estimated",
                      intercept=g.get("intercept"), fit_window_s=_pair(g.get("fit_window_s")),
                      band_hz=_pair(g.get("band_hz")), n_points=int(g.get("n_points") or 0),
                      note=g.get("note") or "", end_amplitude=g.get("end_accel_peak"),
                      model=g.get("model") or "", onset_ci95_s=_pair(g.get("onset_ci95_s")),
                      level_off_s=g.get("level_off_s")),
        overall=Overall(velocity_rms_mm_s=_f(o.get("velocity_rms_mm_s")), zone=o.get("zone") or "",
                        band_hz=tuple(o.get("band_hz") or (math.nan, math.nan)),
                        machine_group=int(o.get("machine_group") or 2), foundation=o.get("foundation") or "",
                        zone_limits_mm_s=tuple(o.get("zone_limits_rms_mm_s") or (math.nan,) * 3),
                        standard=o.get("standard") or ""),
        orders={k: OrderLine(frequency_hz=v.get("frequency_hz"), amplitude=v.get("accel_peak"),
                             velocity_mm_s=v.get("velocity_peak_mm_s"))
                for k, v in (d.get("orders") or {}).items()},
        waveform=Waveform(rms=_f(wf.get("accel_rms")), peak=_f(wf.get("accel_peak")),
                          crest_factor=wf.get("crest_factor"), kurtosis=wf.get("kurtosis")),
        tones=tuple(Tone(frequency_hz=_f(t.get("frequency_hz")), order=_f(t.get("order")),
                         amplitude=_f(t.get("accel_peak")), snr_db=_f(t.get("snr_db")))
                    for t in d.get("tones") or []),
        quality=Quality(ok=bool(q.get("ok", True)), flags=tuple(q.get("flags") or ()),
                        notes=tuple(q.get("notes") or ())),
        spectrum=Spectrum(freqs_hz=empty, amplitude=empty, psd=empty, floor_psd=empty,
                          df_hz=_f(ss.get("df_hz")), nperseg=0, n_segments=int(ss.get("n_segments") or 0),
                          nu_eff=_f(ss.get("nu_eff")), enbw_bins=math.nan),
        envelope_t_s=empty, envelope=empty,
        version=str(d.get("upgraded_from") or d.get("version") or ANALYSIS_VERSION),
    )
