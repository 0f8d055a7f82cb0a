"""The analyze_record contract: arguments, JSON-safe output, charts, purity of the package."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from analysis import SignalError, analyze_record

KEYS = {
    "forcing": {"frequency_hz", "source", "nominal_hz"},
    "subharmonic": {"detected", "class", "frequency_hz", "order", "accel_peak", "velocity_peak_mm_s",
                    "velocity_rms_mm_s", "snr_db", "threshold_db", "pfa", "family"},
    "growth": {"rate_per_s", "ci95_per_s", "onset_s", "state", "intercept", "fit_window_s"},
    "overall": {"velocity_rms_mm_s", "zone", "band_hz", "machine_group", "foundation",
                "zone_limits_rms_mm_s"},
    "waveform": {"accel_rms", "accel_peak", "crest_factor", "kurtosis"},
    "quality": {"ok", "flags"},
}  # fmt: skip


def _record(make_record, lam=0.3):
    return make_record(2560.0, 30.0, [(29.6, 0.4, 0), (59.2, 0.1, 0), (14.8, 0.03, lam)], noise=0.01, seed=1)


def test_to_dict_has_the_contract_keys_and_is_json_safe(make_record):
    d = analyze_record(_record(make_record), 2560.0, units="g", forcing_hz=29.6).to_dict()
    for section, keys in KEYS.items():
        assert keys <= set(d[section]), section
    assert {"version", "sample_rate_hz", "n_samples", "duration_s", "units", "orders", "tones"} <= set(d)
    assert set(d["subharmonic"]["family"]) == {"1.5X", "2.5X"}
    assert set(d["orders"]) == {"1X", "2X"}
    json.dumps(d, allow_nan=False)  # no NaN or inf anywhere
    assert d["n_samples"] == 76800 and d["duration_s"] == pytest.approx(30.0)
    assert d["forcing"]["source"] == "given"
    assert d["subharmonic"]["class"] == "half-order" and d["growth"]["state"] == "growing"


def test_flat_record_is_flagged_and_json_safe():
    d = analyze_record(np.zeros(65536), 2560.0, forcing_hz=30.0).to_dict()
    json.dumps(d, allow_nan=False)
    assert "flat-line" in d["quality"]["flags"] and d["quality"]["ok"] is False
    assert d["subharmonic"]["detected"] is False


def test_short_record_is_flagged_or_rejected(make_record):
    # 4 s at 30 Hz: 0.5X and 1X resolved, but not whirl at 0.48X from 0.5X (needs >= 250/f1x s: Rayleigh
    # resolution 1/T, common practice); under 16 cycles of 1X (1366 samples here) it is refused
    x = make_record(2560.0, 4.0, [(30.0, 0.4, 0)], noise=0.01)
    assert "too-short-for-resolution" in analyze_record(x, 2560.0, forcing_hz=30.0).quality.flags
    with pytest.raises(SignalError, match="too short: 1300 samples .* send at least 1366 samples"):
        analyze_record(x[:1300], 2560.0, forcing_hz=30.0)


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({}, "forcing_hz"),
        ({"forcing_hz": 30.0, "nominal_hz": 30.0}, "forcing_hz"),
        ({"forcing_hz": -1.0}, "forcing_hz"),
        ({"nominal_hz": 900.0}, "nominal_hz"),
        ({"forcing_hz": 30.0, "units": "furlongs"}, "units"),
        ({"forcing_hz": 30.0, "machine_group": 3}, "machine_group"),
        ({"forcing_hz": 30.0, "foundation": "floating"}, "foundation"),
        ({"forcing_hz": 30.0, "pfa": 2.0}, "pfa"),
    ],
)
def test_bad_arguments_raise_signal_error_with_field(make_record, kwargs, field):
    x = make_record(2560.0, 10.0, [(30.0, 0.4, 0)])
    with pytest.raises(SignalError) as exc:
        analyze_record(x, 2560.0, **kwargs)
    assert exc.value.field == field and len(str(exc.value)) > 20


def test_units_change_velocity_not_detection(make_record):
    x = _record(make_record, lam=0.0)
    g = analyze_record(x, 2560.0, units="g", forcing_hz=29.6)
    m = analyze_record(x * 9.80665, 2560.0, units="m/s^2", forcing_hz=29.6)
    assert m.units == "m/s2"
    assert m.overall.velocity_rms_mm_s == pytest.approx(g.overall.velocity_rms_mm_s, rel=1e-9)
    assert m.subharmonic.velocity_mm_s == pytest.approx(g.subharmonic.velocity_mm_s, rel=1e-9)


def test_chart_spectrum_decimates_with_max_hold(make_record):
    r = analyze_record(_record(make_record), 2560.0, forcing_hz=29.6)
    f, a = r.chart_spectrum(max_points=300)
    assert len(f) <= 300 and np.all(np.diff(f) > 0)
    assert a.max() == r.spectrum.amplitude.max()
    full_f, full_a = r.chart_spectrum(max_points=10**7)
    np.testing.assert_array_equal(full_a, r.spectrum.amplitude)


def test_results_are_frozen(make_record):
    r = analyze_record(_record(make_record), 2560.0, forcing_hz=29.6)
    with pytest.raises(AttributeError):
        r.units = "g"  # type: ignore[misc]
    with pytest.raises(ValueError):
        r.spectrum.amplitude[0] = 1.0


def test_importing_analysis_pulls_in_no_server_or_web_stack():
    # house rule: analysis/ never imports server, fastapi or sqlalchemy
    code = (
        "import sys, analysis, analysis.io; "
        "heavy = ('server', 'fastapi', 'sqlalchemy', 'starlette', 'pydantic'); "
        "bad = [m for m in heavy if m in sys.modules]; "
        "print(','.join(bad))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


@pytest.mark.parametrize("kind", ["offset", "integers", "clipped", "tiny", "whirl-and-half"])
def test_awkward_records_give_json_safe_results(kind):
    rng = np.random.default_rng(21)
    fs, f1, n = 2560.0, 24.0, 120_000
    t = np.arange(n) / fs
    x = {
        "offset": 5.0 + 1e-12 * rng.standard_normal(n),
        "integers": np.round(3 * rng.standard_normal(n)),
        "clipped": np.clip(3 * np.sin(2 * np.pi * f1 * t) + rng.standard_normal(n), -2, 2),
        "tiny": 1e-15 * rng.standard_normal(n),
        "whirl-and-half": np.sin(2 * np.pi * f1 * t) + 0.1 * np.sin(2 * np.pi * 0.44 * f1 * t)
        + np.exp(0.3 * (t - t[-1])) * np.sin(np.pi * f1 * t) + 1e-3 * rng.standard_normal(n),
    }[kind]  # fmt: skip
    d = analyze_record(x, fs, nominal_hz=f1).to_dict()
    json.dumps(d, allow_nan=False)
    if kind == "clipped":
        assert "clipping" in d["quality"]["flags"]
    if kind == "whirl-and-half":
        assert d["subharmonic"]["class"] == "half-order"
        assert any(abs(t["order"] - 0.44) < 0.005 for t in d["tones"])


def test_implausible_values_are_rejected():
    with pytest.raises(SignalError, match="check the scaling"):
        analyze_record(np.full(4096, 1e12), 2560.0, forcing_hz=30.0)


def test_added_keys_precursor_spectrum_and_speed_spread(make_record):
    # added after issue 2 (never renamed): subharmonic.precursor (None for a line), subharmonic.spectrum
    # ("average" | "last-segments") and forcing.spread_hz (1X wander; 0 within the per-segment scatter for
    # a steady synthetic 1X)
    d = analyze_record(_record(make_record), 2560.0, units="g", forcing_hz=29.6).to_dict()
    assert d["subharmonic"]["precursor"] is None and d["subharmonic"]["spectrum"] == "average"
    assert 0.0 <= d["forcing"]["spread_hz"] < 0.01
    assert "speed-drift" not in d["quality"]["flags"]
