"""The stored result contract: every amplitude names its measure, and old results read back.

Reference for the peak / r.m.s. relation: a sine of peak A has r.m.s. A / sqrt(2) (any circuit-theory
or vibration handbook, e.g. Harris' Shock and Vibration Handbook, ch. 1, "root-mean-square value").
"""

from __future__ import annotations

import json
import math

import pytest

from analysis import analyze_record
from analysis.result_compat import upgrade_result_dict
from analysis.results import RecordAnalysis


def _result(make_record, lam=0.3):
    x = make_record(2560.0, 30.0, [(29.6, 0.4, 0), (59.2, 0.1, 0), (14.8, 0.03, lam)], noise=0.01, seed=1)
    return analyze_record(x, 2560.0, units="g", forcing_hz=29.6)


def _as_v1(d: dict) -> dict:
    """The same result as version 1.0 wrote it (the keys before every amplitude named its measure)."""
    old = json.loads(json.dumps(d))
    old["version"] = "1.0"
    sub = old["subharmonic"]
    sub["amplitude"], sub["velocity_mm_s"] = sub.pop("accel_peak"), sub.pop("velocity_peak_mm_s")
    del sub["velocity_rms_mm_s"]
    for line in old["orders"].values():
        line["amplitude"], line["velocity_mm_s"] = line.pop("accel_peak"), line.pop("velocity_peak_mm_s")
        del line["velocity_rms_mm_s"]
    old["growth"]["end_amplitude"] = old["growth"].pop("end_accel_peak")
    old["overall"]["zone_limits_mm_s"] = old["overall"].pop("zone_limits_rms_mm_s")
    old["waveform"]["rms"], old["waveform"]["peak"] = old["waveform"].pop("accel_rms"), old["waveform"].pop(
        "accel_peak")
    for t in old["tones"]:
        t["amplitude"] = t.pop("accel_peak")
    return old


def test_line_velocities_are_given_as_peak_and_rms(make_record):
    d = _result(make_record, lam=0.0).to_dict()  # a steady 0.5X line of 0.03 g peak
    sub, one_x = d["subharmonic"], d["orders"]["1X"]
    for line in (sub, one_x):
        # r.m.s. of a sine = peak / sqrt 2 (handbook relation, see module docstring)
        assert line["velocity_rms_mm_s"] == pytest.approx(line["velocity_peak_mm_s"] / math.sqrt(2.0),
                                                          rel=1e-12)
    # the 0.5X line was simulated at 0.03 g peak: V_peak = A / (2 pi f), g = 9.80665 m/s2 (ISO 80000-3)
    v_peak = 0.03 * 9.80665 / (2 * math.pi * 14.8) * 1e3
    assert sub["velocity_peak_mm_s"] == pytest.approx(v_peak, rel=0.05)
    assert not any(k in sub for k in ("amplitude", "velocity_mm_s"))


def test_from_dict_round_trips_the_json(make_record):
    d = _result(make_record).to_dict()
    again = RecordAnalysis.from_dict(d).to_dict()
    assert again == d


def test_a_version_1_result_reads_as_the_new_keys(make_record):
    d = _result(make_record).to_dict()
    old = _as_v1(d)
    up = upgrade_result_dict(old)
    assert up["subharmonic"]["velocity_rms_mm_s"] == pytest.approx(d["subharmonic"]["velocity_rms_mm_s"])
    assert up["orders"]["1X"]["accel_peak"] == d["orders"]["1X"]["accel_peak"]
    assert up["overall"]["zone_limits_rms_mm_s"] == d["overall"]["zone_limits_rms_mm_s"]
    assert old["subharmonic"]["amplitude"] is not None  # the input is not changed in place
    typed = RecordAnalysis.from_dict(old)
    assert typed.version == "1.0"
    assert typed.subharmonic.velocity_mm_s == pytest.approx(d["subharmonic"]["velocity_peak_mm_s"])
    assert typed.orders["1X"].velocity_rms_mm_s == pytest.approx(d["orders"]["1X"]["velocity_rms_mm_s"])
    assert typed.waveform.crest_factor == pytest.approx(d["waveform"]["crest_factor"])
