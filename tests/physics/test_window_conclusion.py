"""The plain conclusion of an operating-window fit (analysis.window.conclusion) against the first instability
tongue of the Mathieu equation worked by hand.

Sources: Landau & Lifshitz, *Mechanics*, 3rd ed., §27 (x'' + 2 zeta w0 x' + w0^2 (1 + h cos W t) x = 0: the
first-order tongue |W - 2 w0| < w0 sqrt(h^2 / 4 - 4 zeta^2)); N. W. McLachlan, *Theory and Application of
Mathieu Functions* (1947), ch. II-IV, and Abramowitz & Stegun, *Handbook of Mathematical Functions*,
20.2.25 (y'' + (a - 2q cos 2t) y = 0: first tongue between b1(q) = 1 - q - q^2/8 + ... and
a1(q) = 1 + q - q^2/8 + ...); scipy.special.mathieu_a / mathieu_b as the reference for a1, b1;
scipy.integrate.solve_ivp for the Floquet multipliers of the damped equation.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.special import mathieu_a, mathieu_b

from analysis.physics.window import CAUTION, conclusion

# Hand-worked example (invented numbers): mode f0 = 12.5 Hz, damping ratio 0.01, k = 0.5 per g of 1X
# acceleration peak, today's 1X acceleration 0.2 g peak, so h = k a = 0.1.
F0, ZETA, K, AMP = 12.5, 0.01, 0.5, 0.2
# L&L §27: half-width = f0 sqrt(h^2/4 - 4 zeta^2) = 12.5 * sqrt(0.0025 - 0.0004) = 12.5 * 0.0458258
# = 0.572822 Hz
A_HAND, B_HAND = 25.0 - 0.572822, 25.0 + 0.572822  # 24.427178 and 25.572822 Hz


def _fit(cov=None, status="fit"):
    return {"status": status, "message": "made for the test", "f0_hz": F0, "zeta": ZETA, "k_per_unit": K,
            "param_cov": cov if cov is not None else [[1e-12, 0, 0], [0, 1e-12, 0], [0, 0, 1e-12]]}


def test_band_edges_follow_the_hand_worked_tongue_and_the_text_says_so():
    speeds = np.linspace(23.0, 27.0, 81)  # readings run every 0.05 Hz across the band
    c = conclusion(_fit(), AMP, 25.0, speeds)
    assert c.status == "unstable" and c.usable and c.inside is True
    assert c.band_hz == pytest.approx((A_HAND, B_HAND), abs=1e-5)  # L&L §27, worked above
    assert c.band_rpm == pytest.approx((60 * A_HAND, 60 * B_HAND), abs=1e-3)  # 1 Hz = 60 r/min
    assert "At today's 1X acceleration of 0.2 g peak, speeds from 24.43 to 25.57 Hz (1,466 to 1,534 r/min)" \
        in c.text
    assert "The present speed, 25.00 Hz, is inside the band." in c.text
    assert "extrapolated" not in c.text and not (c.extrapolated_low or c.extrapolated_high)
    assert c.caution == CAUTION and "manufacturer" in c.caution and "site" in c.caution


def test_undamped_edges_sit_on_the_mathieu_characteristic_curves_to_order_q_squared():
    # Standard form (McLachlan; A&S 20.2.25): with tau = W t / 2 the undamped equation becomes
    # y'' + (a - 2q cos 2 tau) y = 0, a = 4 w0^2 / W^2, |q| = a h / 2; the first tongue is b1(q) < a < a1(q),
    # a1, b1 = 1 +- q + O(q^2) (for this form; 1 +- q/2 belongs to y'' + (a - q cos 2t) y = 0).
    # At W below 2 w0 (a > 1) the edge is a = a1(q), above (a < 1) it is a = b1(q).
    c = conclusion({**_fit(), "zeta": 1e-9}, AMP, 25.0, [25.0])
    lo, hi = c.band_hz
    assert (lo, hi) == pytest.approx((25.0 - 0.625, 25.0 + 0.625), abs=1e-6)  # h w0 / 2 in Hz: 0.1 * 12.5 / 2
    for edge, char in ((lo, mathieu_a), (hi, mathieu_b)):
        a = 4 * F0**2 / edge**2
        q = a * 0.1 / 2
        assert abs(a - char(1, q)) < q**2  # first order: the neglected terms are -q^2/8 and smaller
        assert abs(a - (1 + q if char is mathieu_a else 1 - q)) < q**2


def _floquet_growth(f_w, h, zeta=ZETA, f0=F0):
    """Largest Floquet exponent (1/s) of x'' + 2 zeta w0 x' + w0^2 (1 + h cos W t) x = 0 by solve_ivp."""
    w0, w = 2 * math.pi * f0, 2 * math.pi * f_w
    period = 2 * math.pi / w

    def rhs(t, y):
        return [y[1], -2 * zeta * w0 * y[1] - w0**2 * (1 + h * math.cos(w * t)) * y[0]]

    cols = [solve_ivp(rhs, (0, period), y0, rtol=1e-10, atol=1e-12).y[:, -1] for y0 in ([1, 0], [0, 1])]
    mult = np.linalg.eigvals(np.column_stack(cols))
    return math.log(max(abs(mult))) / period


def test_the_stated_edges_bracket_the_damped_floquet_boundary():
    # The first-order edges are good to O(h^2): 0.05 Hz inside the band the Floquet exponent is positive,
    # 0.05 Hz outside it is negative (scipy solve_ivp monodromy, not our stability module).
    c = conclusion(_fit(), AMP, 25.0, np.linspace(23, 27, 81))
    lo, hi = c.band_hz
    h = K * AMP
    assert _floquet_growth(lo + 0.05, h) > 0 > _floquet_growth(lo - 0.05, h)
    assert _floquet_growth(hi - 0.05, h) > 0 > _floquet_growth(hi + 0.05, h)


def test_edge_intervals_come_from_the_fit_covariance():
    # f0 alone uncertain (sd 0.01 Hz): A = f0 (2 - c), c = sqrt(h^2/4 - 4 zeta^2) = 0.0458258, so A is normal
    # with sd 0.01 (2 - c) = 0.0195417 Hz and a 95 % interval A +- 1.959964 * 0.0195417 = A +- 0.038301 Hz
    # (normal quantile from scipy.stats.norm.ppf(0.975)); the same holds for B with (2 + c).
    c = conclusion(_fit([[1e-4, 0, 0], [0, 0, 0], [0, 0, 0]]), AMP, 25.0, np.linspace(23, 27, 81))
    assert c.band_low_ci95_hz == pytest.approx((A_HAND - 0.038301, A_HAND + 0.038301), abs=0.004)
    assert c.band_high_ci95_hz == pytest.approx((B_HAND - 0.040097, B_HAND + 0.040097), abs=0.004)
    # nearest stable speeds: the outer ends of those intervals; the skipped range adds 1 % of speed
    assert c.stable_below_hz == pytest.approx(c.band_low_ci95_hz[0]) and c.stable_above_hz == pytest.approx(
        c.band_high_ci95_hz[1])
    assert c.skip_hz == pytest.approx((0.99 * c.stable_below_hz, 1.01 * c.stable_above_hz))
    assert c.skip_hz[0] < c.band_hz[0] < c.band_hz[1] < c.skip_hz[1]
    assert f"from {c.skip_hz[0]:.2f} to {c.skip_hz[1]:.2f} Hz shaft speed" in c.skip_text
    assert "widened by 1 % of speed" in c.skip_text and "r/min" in c.skip_text


def test_flags_edges_beyond_the_speeds_run():
    # readings only at 24.9-25.1 Hz: both edges lie where no speed was run
    c = conclusion(_fit(), AMP, 25.0, np.linspace(24.9, 25.1, 21))
    assert c.extrapolated_low and c.extrapolated_high
    assert "Readings were taken only at 24.90–25.10 Hz: both edges are extrapolated" in c.text
    # readings on both sides of the lower edge only
    c = conclusion(_fit(), AMP, 24.0, np.linspace(24.0, 25.0, 21))
    assert not c.extrapolated_low and c.extrapolated_high and "the upper edge is extrapolated" in c.text
    assert "The present speed, 24.00 Hz, is 0.43 Hz below the band." in c.text  # 24.427 - 24.0


def test_below_the_tongue_tip_no_speed_is_unstable():
    # tip of the tongue: a_c = 4 zeta / k = 0.08 g peak at 2 f0 = 25 Hz (L&L §27, h_c = 4 zeta at tuning)
    c = conclusion(_fit(), 0.07, 25.0, np.linspace(23, 27, 81))
    assert c.status == "stable" and c.band_hz is None and c.inside is False
    assert "the fit finds no unstable speed: the tongue's tip at 25.00 Hz needs 0.08 g peak" in c.text


def test_shaft_speed_differs_from_the_forcing_frequency():
    # a two-stroke-per-revolution machine: 1X is twice the shaft speed, so r/min = 60 * Hz / 2
    c = conclusion(_fit(), AMP, 25.0, np.linspace(23, 27, 81), forcing_per_rev=2.0, units="g")
    assert c.band_rpm == pytest.approx((30 * A_HAND, 30 * B_HAND), abs=1e-3)
    assert "1X frequencies from 24.43 to 25.57 Hz (733 to 767 r/min shaft" in c.text
    assert f"{c.skip_hz[0] / 2:.2f} to {c.skip_hz[1] / 2:.2f} Hz shaft speed" in c.skip_text


def test_without_a_usable_fit_it_says_so():
    c = conclusion({"status": "not_enough_data", "message": "need at least 10 labelled records"}, 0.2, 25.0,
                   [25.0])
    assert c.status == "no_fit" and not c.usable and c.band_hz is None and c.skip_hz is None
    assert c.text == "No plain conclusion yet: need at least 10 labelled records."
    weak = conclusion(_fit(status="weakly_constrained"), AMP, 25.0, np.linspace(23, 27, 81))
    assert weak.status == "unstable" and not weak.usable and weak.text.startswith("Indicative only")
    with pytest.raises(ValueError, match="margin"):
        conclusion(_fit(), AMP, 25.0, [25.0], margin=0.7)


def test_without_a_covariance_no_interval_and_no_skip_range_are_claimed():
    # a fit that could not estimate its covariance (status weakly_constrained): the band is the estimate
    # alone, said so, and no skipped-speed range is proposed from it
    fit = {**_fit(status="weakly_constrained"), "param_cov": None}
    c = conclusion(fit, AMP, 25.0, np.linspace(23, 27, 81))
    assert c.band_hz == pytest.approx((A_HAND, B_HAND), abs=1e-5)
    assert c.band_low_ci95_hz is None and c.band_high_ci95_hz is None and c.skip_hz is None
    assert "the fit states no interval for the edges" in c.text
    assert c.skip_text.startswith("No skipped-speed range is proposed")


def test_no_skip_range_from_an_interval_too_wide_to_program():
    # f0 uncertain by 3 Hz (sd): the band's 95 % interval spans far more than 30 % of speed
    c = conclusion(_fit([[9.0, 0, 0], [0, 0, 0], [0, 0, 0]]), AMP, 25.0, np.linspace(23, 27, 81))
    assert c.skip_hz is None and "too wide to program" in c.skip_text


def test_one_speed_gives_the_threshold_at_that_speed():
    # a fixed-speed machine: the fit measures only the 1X threshold at its speed (status one_speed)
    fit = {"status": "one_speed", "message": "all records at one speed", "amp_threshold": 0.12,
           "amp_threshold_lo": 0.1, "amp_threshold_hi": 0.15}
    c = conclusion(fit, 0.2, 24.75, [24.74, 24.75, 24.76])
    assert c.status == "no_fit" and c.band_hz is None and c.skip_hz is None
    assert ("At 24.75 Hz the half-order line appears above a 1X acceleration of about 0.12 g peak "
            "(95 % interval 0.1 to 0.15); today's 0.2 g peak is above it.") in c.text
