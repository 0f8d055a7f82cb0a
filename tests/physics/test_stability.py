"""Floquet stability of the damped Mathieu model against outside references.

References used below:
* Landau & Lifshitz, *Mechanics* (3rd ed.), section 27 (parametric resonance, small-h growth s = h w0 / 4 at
  tuning, tongue |eps| < h w0 / 2) and the end of §27 (with friction: threshold h_c = 4 lambda / w0 = 4 zeta).
* scipy.special.mathieu_a / mathieu_b (characteristic values; scipy is the general-purpose reference library).
* Abramowitz & Stegun, Handbook of Mathematical Functions, Table 20.1 tabulates the same characteristic
  values; the numbers in AS_TABLE below were taken from scipy.special.mathieu_a / mathieu_b (8 decimals),
  not from the table.
* Liouville/Abel formula det M = exp(integral of tr A) (Floquet theory, any ODE text).
* Numbers marked "checked numerically against scipy" are our own earlier computations with
  scipy.integrate.solve_ivp (DOP853, rtol 1e-10, monodromy matrix over one period); the formula each one
  checks is named beside it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.special import mathieu_a, mathieu_b

from analysis.physics import stability as st

F0 = 25.0
W0 = 2 * math.pi * F0


def test_undamped_growth_at_tuning_matches_reference_value_and_landau_lifshitz():
    res = st.floquet_growth(F0, 0.0, 2 * F0, 0.1)
    # checked numerically against scipy (scipy solve_ivp DOP853 monodromy): 3.925841 1/s
    assert res.growth_rate_per_s == pytest.approx(3.925841, rel=1e-5)
    # Landau & Lifshitz section 27: s = h w0 / 4 at exact tuning; first-order error ~0.03 % at h = 0.1
    assert res.growth_rate_per_s == pytest.approx(0.1 * W0 / 4, rel=1e-3)
    # inside the tongue both multipliers are real and negative: response at W/2 (Floquet theory)
    assert res.response == "half-order"
    assert all(abs(r.imag) < 1e-12 and r.real < 0 for r in res.multipliers)


@pytest.mark.parametrize(
    ("zeta", "h", "detune", "expected"),
    # checked numerically against scipy (solve_ivp DOP853 monodromy); formula: L&L Mechanics §27 (with
    # friction)
    [
        (0.0, 0.01, 0.0, 0.392698),
        (0.0, 0.20, 0.0, 7.844804),
        (0.01, 0.03, 0.0, -0.392712),
        (0.01, 0.10, 0.0, 2.355184),
        (0.01, 0.10, 0.02, 2.01317),
        (0.01, 0.10, 0.04, 0.74053),
    ],
)
def test_growth_table(zeta, h, detune, expected):
    fw = (2 * W0 + detune * W0) / (2 * math.pi)
    assert st.floquet_growth(F0, zeta, fw, h).growth_rate_per_s == pytest.approx(expected, rel=2e-5)


@pytest.mark.parametrize("h", [0.01, 0.05, 0.1])
def test_small_h_damped_growth_matches_landau_lifshitz_section_29(h):
    # L&L Mechanics §27 (with friction): lambda_net = -zeta w0 + 1/2 sqrt((h w0/2)^2 - eps^2); within 1 % for
    # h <= 0.1
    # and |eps| <= h w0 / 4 (our tolerance for the first-order formula)
    for eps in (0.0, 0.25 * h * W0):
        fw = (2 * W0 + eps) / (2 * math.pi)
        flo = st.floquet_growth(F0, 0.005, fw, h).growth_rate_per_s + 0.005 * W0
        lnl = st.growth_rate_first_order(F0, 0.005, fw, h) + 0.005 * W0
        assert flo == pytest.approx(lnl, rel=1e-2)


def test_liouville_determinant():
    # Liouville: det M = exp(-2 zeta w0 T); value 0.9391014 for zeta = 0.01, f0 = 25 Hz, W = 2 w0
    res = st.floquet_growth(F0, 0.01, 2 * F0, 0.1)
    assert res.det_monodromy == pytest.approx(math.exp(-2 * 0.01 * W0 / (2 * F0)), abs=1e-8)
    assert res.det_monodromy == pytest.approx(0.9391014, abs=1e-7)


def test_threshold_is_four_zeta_at_tuning():
    # L&L Mechanics §27 (with friction): h_c = 4 lambda / w0 = 4 zeta (first order); Floquet within 0.06 % for
    # zeta <= 0.05
    for zeta in (0.005, 0.01, 0.02, 0.05):
        assert st.threshold_first_order(F0, zeta, 2 * F0) == pytest.approx(4 * zeta, rel=1e-12)
        assert st.threshold_floquet(F0, zeta, 2 * F0) == pytest.approx(4 * zeta, rel=6e-4)


@pytest.mark.parametrize(
    ("zeta", "detune", "expected"),
    [  # checked numerically against scipy (solve_ivp DOP853 + brentq); formula 2 sqrt((eps/w0)^2 + 4 zeta^2)
        (0.005, 0.02, 0.044880),
        (0.01, 0.0, 0.040001),
        (0.01, 0.02, 0.056855),
        (0.02, 0.02, 0.090035),
        (0.05, 0.02, 0.205567),
    ],
)
def test_threshold_table(zeta, detune, expected):
    fw = F0 * (2 + detune)
    assert st.threshold_floquet(F0, zeta, fw) == pytest.approx(expected, abs=1e-5)
    first = 2 * math.sqrt(detune**2 + 4 * zeta**2)
    assert st.threshold_first_order(F0, zeta, fw) == pytest.approx(first, rel=1e-12)
    assert st.threshold_floquet(F0, zeta, fw) == pytest.approx(first, rel=1e-2)


@pytest.mark.parametrize("q", [0.1, 0.5, 1.0, 2.0, 5.0])
def test_undamped_edges_match_scipy_mathieu_characteristic_values(q):
    # scipy.special.mathieu_a(1, q), mathieu_b(1, q): on the first-tongue edges the standard-form monodromy
    # has multiplier -1. Our damped model with zeta = 0 maps to a = 4 w0^2/W^2, q = 2 w0^2 h / W^2.
    for char in (mathieu_a(1, q), mathieu_b(1, q)):
        # choose W and h that land exactly on (a, q)
        r = 2.0 / math.sqrt(char) if char > 0 else None
        if r is None:
            continue  # negative a cannot be reached with real w0 / W
        h = q * r**2 / 2.0
        a, qq = st.mathieu_standard_form(1.0, 0.0, r, h)
        assert a == pytest.approx(char, rel=1e-14) and qq == pytest.approx(q, rel=1e-14)
        m = st.monodromy(1.0, 0.0, r, h)
        assert np.trace(m) / 2 == pytest.approx(-1.0, abs=1e-9)


def test_undamped_tongue_edges_from_mathieu_values():
    # checked numerically against scipy (solve_ivp DOP853 + brentq): h = 0.1 -> 1.949698, 2.049679 (W / w0)
    lo, hi = st.tongue_edges_undamped(0.1)
    assert (lo, hi) == pytest.approx((1.949698, 2.049679), abs=1e-6)
    # Floquet edges with zeta = 0 agree with the Mathieu characteristic values (scipy) to 1e-8
    flo = st.tongue_edges_floquet(1.0, 0.0, 0.1)
    assert flo == pytest.approx((lo, hi), abs=1e-8)
    # L&L section 27: first-order edges 2 -+ h/2
    assert st.tongue_edges_first_order(1.0, 0.0, 0.1) == pytest.approx((1.95, 2.05), abs=1e-12)


def test_damped_tongue_edges():
    # checked numerically against scipy (solve_ivp DOP853 + brentq): zeta = 0.01, h = 0.1 -> 1.953771,
    # 2.045406
    assert st.tongue_edges_floquet(1.0, 0.01, 0.1) == pytest.approx((1.953771, 2.045406), abs=2e-6)
    # L&L Mechanics §27 (with friction): |W - 2 w0| < w0 sqrt(h^2/4 - 4 zeta^2)
    lo, hi = st.tongue_edges_first_order(1.0, 0.01, 0.1)
    assert hi - 2.0 == pytest.approx(math.sqrt(0.0025 - 0.0004), rel=1e-12)
    assert st.tongue_edges_first_order(1.0, 0.01, 0.03) is None  # below 4 zeta
    assert st.tongue_edges_floquet(1.0, 0.01, 0.03) is None


# Values from scipy.special.mathieu_a / mathieu_b to 8 decimals (the functions Abramowitz & Stegun
# Table 20.1 tabulates): (q, kind, order, value)
AS_TABLE = [
    (5, "a", 0, -5.80004602),
    (5, "b", 1, -5.79008060),
    (10, "a", 1, -2.39914240),
    (5, "a", 2, 7.44910974),
    (10, "a", 0, -13.93697996),
    (5, "b", 2, 2.09946045),
]


@pytest.mark.parametrize(("q", "kind", "order", "value"), AS_TABLE)
def test_characteristic_values_by_shooting_match_abramowitz_stegun(q, kind, order, value):
    # Our standard-form Floquet (trace of the monodromy) must be +-1 at a tabulated characteristic value:
    # Delta = +1 for even orders (period pi), -1 for odd orders (period 2 pi) (DLMF 28.2.16 / A&S 20.3).
    assert (mathieu_a if kind == "a" else mathieu_b)(order, q) == pytest.approx(value, abs=1e-8)
    target = 1.0 if order % 2 == 0 else -1.0

    def offset(a: float) -> float:
        return st._half_period_trace(np.array([a]), np.array([float(q)]), 3000)[0] - target

    root = brentq(offset, value - 2e-4, value + 2e-4, xtol=1e-12)
    assert root == pytest.approx(value, abs=2e-8)


def test_vectorised_chart_matches_dop853_floquet_on_sample_points():
    ratios = np.linspace(1.8, 2.2, 41)
    mods = np.linspace(0.0, 0.3, 31)
    chart = st.stability_chart(F0, 0.01, ratios, mods)
    assert chart.growth_rate_per_s.shape == (31, 41)
    rng = np.random.default_rng(3)
    for i, j in zip(rng.integers(0, 31, 12), rng.integers(0, 41, 12), strict=True):
        exact = st.floquet_growth(F0, 0.01, ratios[j] * F0, mods[i]).growth_rate_per_s
        # the fixed-step chart keeps 1e-4 1/s absolute against DOP853 (scipy) on this grid
        assert chart.growth_rate_per_s[i, j] == pytest.approx(exact, abs=1e-4)
    closed = st.stability_chart(F0, 0.01, ratios, mods, method="first-order")
    # L&L first order agrees near the tongue centre for small h (row h = 0.05, ratio 2.0)
    assert closed.growth_rate_per_s[5, 20] == pytest.approx(chart.growth_rate_per_s[5, 20], rel=2e-3)
    # damped threshold of the chart boundary: the sign change in column ratio = 2 is near h = 4 zeta
    col = chart.growth_rate_per_s[:, 20]
    assert mods[np.argmax(col > 0)] == pytest.approx(0.04, abs=0.011)


def test_summary_margin_and_errors():
    s = st.stability_summary(F0, 0.01, 2 * F0, 0.03)
    # L&L: h_c = 4 zeta = 0.04 at tuning -> h / h_c = 0.75, headroom 25 %
    assert s.ratio_to_threshold_pct == pytest.approx(75.0, abs=0.01)
    assert s.margin_pct == pytest.approx(25.0, abs=0.01)
    assert s.to_dict()["doubling_time_s"] is None
    above = st.stability_summary(F0, 0.01, 2 * F0, 0.08).to_dict()
    assert above["margin_pct"] < 0
    assert above["doubling_time_s"] == pytest.approx(math.log(2) / 1.570315, rel=1e-4)
    with pytest.raises(ValueError, match="zeta"):
        st.floquet_growth(F0, 1.5, 50.0, 0.1)
    with pytest.raises(ValueError, match="forcing_hz"):
        st.floquet_growth(F0, 0.01, -1.0, 0.1)


def test_cli_stability_json_and_errors(capsys):
    import json

    from server.cli import main as cli_main

    args = ["stability", "--f0", "25", "--zeta", "0.01", "--forcing-hz", "50", "--modulation", "0.1"]
    assert cli_main([*args, "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    # checked numerically against scipy (solve_ivp DOP853 monodromy): 2.355184 1/s; L&L: h_c = 4 zeta at
    # tuning
    assert d["growth_rate_per_s"] == pytest.approx(2.355184, rel=1e-5)
    assert d["threshold_modulation"] == pytest.approx(0.04, rel=1e-4)
    assert d["margin_pct"] == pytest.approx(100 * (1 - 0.1 / d["threshold_modulation"]), rel=1e-12)
    assert cli_main(args) == 0
    assert "GROWING" in capsys.readouterr().out
    bad = ["stability", "--f0", "25", "--zeta", "1.2", "--forcing-hz", "50", "--modulation", "0.1"]
    assert cli_main(bad) == 2
    assert "--zeta" in capsys.readouterr().err


def test_vectorised_threshold_curve_matches_brentq_floquet():
    ratios = np.array([1.8, 1.96, 2.0, 2.02, 2.1, 2.2])
    curve = st.threshold_curve(F0, 0.01, ratios)
    for r, hc in zip(ratios, curve, strict=True):
        # DOP853 + brentq threshold (checked against the scipy values of test_threshold_* above)
        assert hc == pytest.approx(st.threshold_floquet(F0, 0.01, r * F0), rel=1e-5)
        # independent of our code: the first-order threshold of Landau & Lifshitz, Mechanics §27 (with
        # friction), h_c = 2 sqrt((eps / w0)^2 + 4 zeta^2) with eps / w0 = r - 2; close to tuning it is
        # within 1 %, 10 % detuned within 10 % (the first-order error grows with h)
        first = 2 * math.sqrt((r - 2.0) ** 2 + 4 * 0.01**2)
        assert hc == pytest.approx(first, rel=0.01 if abs(r - 2.0) <= 0.04 else 0.10), r
    # L&L Mechanics §27 (with friction) at tuning: 4 zeta; checked numerically against scipy: 0.056855 at eps
    # = 0.02 w0
    assert curve[2] == pytest.approx(0.04, rel=1e-3)
    assert curve[3] == pytest.approx(0.056855, abs=1e-5)
    assert np.isinf(st.threshold_curve(1.0, 0.05, [1.2], h_max=0.5)[0])
