"""The compact chart spectrum (server/storage/packing.py) against the full spectrum of a real analysis.

Stated error: every decoded value is within MAX_REL_ERROR (0.5 %) of the max-hold value of its bucket, the
largest value is exact, and the decoded frequencies are the frequencies of the bins that held each
bucket's maximum. The reference for max-hold is numpy's own ``np.maximum.reduceat`` over the same bucket
edges (numpy, as a reference library), not the project's ``max_hold``.
"""

from __future__ import annotations

import numpy as np
import pytest
from support.signals import tone_record

from analysis import analyze_record
from server.storage import packing


@pytest.fixture(scope="module")
def analysed():
    x = tone_record(np.random.default_rng(7), amp_half=0.05, growth_per_s=0.02, n=32768)
    return analyze_record(x, 2560.0, units="m/s2", nominal_hz=24.75)


def _pack(an, spectrum_points, envelope_points=1000):
    return packing.pack_chart({"units": "m/s2", "amplitude": "peak"}, {
        ("freqs_hz", "amplitude"): (an.spectrum.freqs_hz, an.spectrum.amplitude, spectrum_points),
        ("envelope_t_s", "envelope"): (an.envelope_t_s, an.envelope, envelope_points)})


@pytest.mark.parametrize("points", [256, 1000, 4096])
def test_round_trip_within_stated_error_of_numpy_max_hold(analysed, points):
    f, a = analysed.spectrum.freqs_hz, analysed.spectrum.amplitude
    meta, got = packing.unpack_arrays(_pack(analysed, points))
    assert meta == {"units": "m/s2", "amplitude": "peak"}
    n = a.size
    k = min(points, n)
    edges = np.linspace(0, n, k + 1).astype(np.intp)[:-1]
    want = np.maximum.reduceat(a, edges)  # numpy reference for max-hold per bucket
    assert got["amplitude"].size == k
    floor = packing.FLOOR * a.max()
    mask = want > floor
    rel = np.abs(got["amplitude"][mask] / want[mask] - 1)
    assert rel.max() <= packing.MAX_REL_ERROR * (1 + 1e-9)
    assert got["amplitude"].max() == pytest.approx(a.max(), rel=1e-15)  # the top line is exact
    # each point sits at the frequency of the bin that held its bucket's maximum
    at = np.searchsorted(f, got["freqs_hz"] - 1e-9 * f[1])
    np.testing.assert_allclose(got["freqs_hz"], f[at], rtol=0, atol=1e-9 * f[1])
    np.testing.assert_allclose(a[at][mask], want[mask], rtol=0)
    if k == n:  # nothing decimated: every bin comes back
        np.testing.assert_allclose(got["freqs_hz"], f, rtol=0, atol=1e-9 * f[1])


def test_half_order_line_survives_heavy_decimation(analysed):
    """The 0.5X line keeps its amplitude and frequency bin when 16 bins share a point."""
    f, a = analysed.spectrum.freqs_hz, analysed.spectrum.amplitude
    band = (f > 0.4 * 24.75) & (f < 0.6 * 24.75)
    i = np.flatnonzero(band)[np.argmax(a[band])]
    _, got = packing.unpack_arrays(_pack(analysed, a.size // 16))
    j = int(np.argmin(np.abs(got["freqs_hz"] - f[i])))
    assert got["freqs_hz"][j] == pytest.approx(f[i], abs=1e-9)
    assert got["amplitude"][j] == pytest.approx(a[i], rel=packing.MAX_REL_ERROR)


def test_envelope_round_trip(analysed):
    t, e = analysed.envelope_t_s, analysed.envelope
    _, got = packing.unpack_arrays(_pack(analysed, 2048, envelope_points=max(2, t.size // 3)))
    edges = np.linspace(0, e.size, max(2, t.size // 3) + 1).astype(np.intp)[:-1]
    want = np.maximum.reduceat(e, edges)  # numpy reference
    mask = want > packing.FLOOR * e.max()
    assert np.abs(got["envelope"][mask] / want[mask] - 1).max() <= packing.MAX_REL_ERROR * (1 + 1e-9)


def test_zeros_nan_negative_and_irregular_x():
    x = np.array([0.0, 1.0, 2.5, 4.0, 7.0])  # not a grid: stored as float32
    y = np.array([0.0, 1e-3, np.nan, 2.0, 1e-12])
    _, got = packing.unpack_arrays(packing.pack_chart({}, {("x", "y"): (x, y, 10)}))
    np.testing.assert_allclose(got["x"], x.astype(np.float32))
    assert got["y"][0] == 0.0 and np.isnan(got["y"][2]) and got["y"][3] == 2.0
    assert got["y"][1] == pytest.approx(1e-3, rel=packing.MAX_REL_ERROR)
    assert got["y"][4] == pytest.approx(packing.FLOOR * 2.0, rel=np.expm1(packing.LOG_STEP))  # below floor
    neg = np.array([-1.0, 0.5, 2.0])
    _, got = packing.unpack_arrays(packing.pack_chart({}, {("x", "y"): (np.arange(3.0), neg, 10)}))
    np.testing.assert_allclose(got["y"], neg)  # float32 fallback, exact for these
    np.testing.assert_allclose(got["x"], [0, 1, 2])


def test_earlier_forms_stay_readable(analysed):
    import zlib

    f, a = analysed.spectrum.freqs_hz, analysed.spectrum.amplitude
    plain = packing.pack_arrays({"units": "m/s2"}, freqs_hz=f, amplitude=a)
    for blob in (plain, zlib.compress(plain)):
        meta, got = packing.unpack_arrays(blob)
        assert meta == {"units": "m/s2"}
        np.testing.assert_array_equal(got["amplitude"], a.astype(np.float32))


def test_compact_is_smaller_than_plain(analysed):
    """The point of the format: the same chart in a fraction of the plain float32 bytes."""
    an = analysed
    plain = packing.pack_arrays({"units": "m/s2", "amplitude": "peak"}, freqs_hz=an.spectrum.freqs_hz,
                                amplitude=an.spectrum.amplitude, envelope_t_s=an.envelope_t_s,
                                envelope=an.envelope)
    assert len(_pack(an, 4096)) < 0.25 * len(plain)
