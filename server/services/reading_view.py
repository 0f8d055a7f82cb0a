"""What the reading page adds to a stored result: the velocity spectrum, whether the record covers the
ISO 20816 band (and so whether a zone may be graded), where the zone limits come from in a user's words,
and a waterfall centred on the opened reading.

Pure reads; the caller checks the record's site.
"""

from __future__ import annotations

import math

from sqlalchemy import select

from analysis.record.conditioning import velocity_mm_s
from analysis.record.severity import band_covers_standard, iso_band
from server.storage.packing import unpack_arrays
from server.storage.queries import SPECTRUM_MEASURES, iso
from server.storage.tables import Record, Result

#: the zone limits' source as the page and the machine page say it (the table is analysis/record/severity.py)
LIMITS_SOURCE = ("Zone limits: ISO 20816-3:2022, Annex A (the same values as ISO 10816-3:2009), for the "
                 "machine group and support set on this machine. Check them against your copy of the "
                 "standard and your site's own limits; the machine manufacturer's limits take precedence.")


def zone_graded(forcing_hz: float | None, fs_hz: float | None) -> bool:
    """Whether a record at ``fs_hz`` reaches the standard's band for this forcing frequency
    (:func:`analysis.record.severity.band_covers_standard`, the rule the analysis grades zones by)."""
    if not forcing_hz or not fs_hz:
        return False
    return band_covers_standard(iso_band(float(forcing_hz), float(fs_hz)), float(forcing_hz))


def band_coverage(result: dict, fs_hz: float) -> dict:
    """``{"covered", "needed_hz", "measured_hz", "text"}``: does the record reach the standard's band?

    The standard's band is :func:`analysis.record.severity.iso_band` with no sample-rate limit (10-1000 Hz,
    or 2-1000 Hz below 600 r/min); the record reaches up to 0.45 x its sample rate (the same function)."""
    overall = result.get("overall") or {}
    forcing = (result.get("forcing") or {}).get("frequency_hz")
    measured = overall.get("band_hz")
    if not forcing or not measured or measured[1] is None:
        return {"covered": False, "needed_hz": None, "measured_hz": measured,
                "text": "The overall level's band is not known for this reading: no zone is graded."}
    needed = iso_band(float(forcing), math.inf)
    covered = band_covers_standard(measured, float(forcing))
    fs_needed = fs_hz * needed[1] / float(measured[1])  # the top edge grows with the sample rate
    text = "" if covered else (
        f"This reading was sampled at {fs_hz:g} Hz, so its overall velocity covers {measured[0]:g}-"
        f"{measured[1]:.0f} Hz, not the {needed[0]:g}-{needed[1]:.0f} Hz band of ISO 20816. The overall "
        f"level is shown for trending, but no zone is graded: take readings at {fs_needed:.0f} Hz "
        "sampling or more to grade it.")
    return {"covered": covered, "needed_hz": list(needed), "measured_hz": list(measured), "text": text}


def velocity_spectrum(spectrum_blob: bytes, units: str, low_hz: float) -> dict:
    """The stored acceleration spectrum (peak of each line, record units) as velocity r.m.s. in mm/s,
    V = A / (2 pi f) / sqrt 2 (:func:`analysis.conditioning.velocity_mm_s`); ``None`` below ``low_hz``,
    where integration would only lift noise (the overall band's low edge)."""
    meta, arrays = unpack_arrays(spectrum_blob)
    unit = meta.get("units") or units
    freqs = arrays["freqs_hz"].tolist()
    amps = arrays["amplitude"].tolist()
    vel = []
    for f, a in zip(freqs, amps, strict=True):
        v = velocity_mm_s(a, f, unit) if f >= low_hz else None
        vel.append(None if v is None else v / math.sqrt(2.0))
    return {"freqs_hz": freqs, "velocity_rms_mm_s": vel, "low_hz": low_hz,
            "measure": "velocity r.m.s. of each line, mm/s (acceleration peak / (2 pi f) / sqrt 2)"}


def waterfall_around(s, record: Record, n: int) -> dict:
    """Up to ``n`` spectra of the record's point, oldest first, with the opened reading in the middle
    (the rest taken from the other side when one side runs short)."""
    scope = (Result.point_id == record.point_id, Result.current)
    half = n // 2
    base = select(Result, Record.measured_at, Record.speed_hz).join(Record, Record.id == Result.record_id)
    older = s.execute(base.where(*scope, Record.measured_at < record.measured_at)
                      .order_by(Record.measured_at.desc()).limit(n)).all()
    newer = s.execute(base.where(*scope, Record.measured_at > record.measured_at)
                      .order_by(Record.measured_at).limit(n)).all()
    this = s.execute(base.where(Result.record_id == record.id, Result.current)).all()
    k_new = min(len(newer), max(n - 1 - half, n - 1 - len(older)))
    k_old = min(len(older), n - 1 - k_new)
    rows = list(reversed(older[:k_old])) + this + newer[:k_new]
    spectra = []
    for res, measured_at, speed in rows:
        meta, arrays = unpack_arrays(res.spectrum)
        spectra.append({"record_id": res.record_id, "measured_at": iso(measured_at), "speed_hz": speed,
                        "forcing_hz": res.forcing_hz, "freqs_hz": arrays["freqs_hz"].tolist(),
                        "amplitude": arrays["amplitude"].tolist(), "units": meta.get("units"),
                        "amplitude_measure": SPECTRUM_MEASURES["amplitude_measure"],
                        "opened": res.record_id == record.id})
    return {"ok": True, "point_id": record.point_id, "record_id": record.id, "spectra": spectra}
