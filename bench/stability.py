"""Stability chart and operating-window fit: time and accuracy kept, as ratios measured in one run.

    .venv/bin/python bench/stability.py

Prints two tables:
1. a 200 x 200 stability chart (frequency ratio 1.8-2.2 x modulation 0-0.3, f0 25 Hz, zeta 0.01) by the
   vectorised fixed-step Floquet integration and by the first-order closed form, against the per-point
   DOP853 Floquet solver (timed on a sample, scaled to the grid), with the largest growth-rate error seen;
2. the operating-window fit over 1,000 and 10,000 invented history records, against one likelihood
   evaluation over the same records (the floor any fit must pay at least once).
Goals (issue 3): chart under 2 s, window fit over 10,000 records under 1 s on this 2-core machine.
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from analysis.physics import stability as st  # noqa: E402
from analysis.physics import window as win  # noqa: E402
from analysis.physics import window_fit as wf  # noqa: E402
from analysis.sim.sim_history import simulate_history  # noqa: E402


def timed(fn, repeats: int) -> float:
    fn()
    samples = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        samples.append(time.perf_counter() - t0)
    return statistics.median(samples)


def main() -> int:
    f0, zeta = 25.0, 0.01
    ratios = np.linspace(1.8, 2.2, 200)
    mods = np.linspace(0.0, 0.3, 200)
    t_flo = timed(lambda: st.stability_chart(f0, zeta, ratios, mods), 5)
    t_cf = timed(lambda: st.stability_chart(f0, zeta, ratios, mods, method="first-order"), 5)
    chart = st.stability_chart(f0, zeta, ratios, mods)
    closed = st.stability_chart(f0, zeta, ratios, mods, method="first-order")
    rng = np.random.default_rng(1)
    ii, jj = rng.integers(0, 200, 150), rng.integers(0, 200, 150)
    # points next to the damped first-order boundary as well, where errors are largest
    hc = st.threshold_first_order(f0, zeta, ratios * f0)
    near_i = np.clip(np.searchsorted(mods, hc[::10]), 0, 199)
    ii = np.concatenate((ii, near_i))
    jj = np.concatenate((jj, np.arange(0, 200, 10)))
    t0 = time.perf_counter()
    exact = np.array([st.floquet_growth(f0, zeta, ratios[j] * f0, mods[i]).growth_rate_per_s
                      for i, j in zip(ii, jj, strict=True)])
    t_point = (time.perf_counter() - t0) / ii.size
    err_flo = np.abs(chart.growth_rate_per_s[ii, jj] - exact)
    err_cf = np.abs(closed.growth_rate_per_s[ii, jj] - exact)
    inside = mods[ii] <= 0.1
    w0 = 2 * np.pi * f0
    t_dop = t_point * ratios.size * mods.size
    print(f"Stability chart 200 x 200 (ratio 1.8-2.2, h 0-0.3, f0 {f0:g} Hz, zeta {zeta}); "
          f"errors over {ii.size} checked points vs DOP853 rtol 1e-11")
    print(f"{'method':<34}{'time s':>10}{'x vs DOP853':>14}{'max |err| 1/s':>16}{'max |err|/w0':>14}")
    print(f"{'DOP853 per point (scaled)':<34}{t_dop:>10.2f}{1.0:>14.3f}{0.0:>16.1e}{0.0:>14.1e}")
    print(f"{'vectorised RK4, ' + str(chart.steps) + ' steps':<34}{t_flo:>10.3f}{t_flo / t_dop:>14.5f}"
          f"{err_flo.max():>16.1e}{err_flo.max() / w0:>14.1e}")
    print(f"{'first-order closed form':<34}{t_cf:>10.4f}{t_cf / t_dop:>14.6f}{err_cf.max():>16.2e}"
          f"{err_cf.max() / w0:>14.1e}")
    print(f"{'  (closed form, h <= 0.1 only)':<34}{'':>10}{'':>14}{err_cf[inside].max():>16.2e}"
          f"{err_cf[inside].max() / w0:>14.1e}")

    t_curve = timed(lambda: st.threshold_curve(f0, zeta, ratios), 2)
    curve = st.threshold_curve(f0, zeta, ratios)
    pick = np.arange(0, 200, 25)
    ref = np.array([st.threshold_floquet(f0, zeta, ratios[j] * f0) for j in pick])
    rel = np.max(np.abs(curve[pick] / ref - 1))
    print(f"{'Floquet threshold curve, 200 ratios':<34}{t_curve:>10.3f}{'':>14}"
          f"{'max rel err vs brentq ' + format(rel, '.1e'):>30}")

    print("\nOperating-window fit (invented histories, tongue f0 12.4 Hz, zeta 0.012, k 0.25)")
    print(f"{'records':>8}{'fit s':>10}{'1 likelihood eval s':>22}{'fit / eval':>12}{'status':>10}"
          f"{'f0 Hz':>10}"
          f"{'zeta':>9}{'k':>8}")
    for n in (1000, 10000):
        h = simulate_history(n, seed=7)
        y = 2.0 * h["present"] - 1.0
        g = h["growth_rate_per_s"]
        grow = np.isfinite(g) & (g >= wf.GROWTH_FLOOR_PER_S) & (h["present"] > 0.5)
        args = (h["speed_hz"], np.log(h["amp_1x"]), y, grow, np.where(grow, g, 0.0))
        theta = np.array([12.4, np.log(0.012), np.log(0.25), np.log(0.1), np.log(0.05)])

        def fit(h=h):
            return win.fit_operating_window(h["speed_hz"], h["amp_1x"], h["present"],
                                            growth_rate_per_s=h["growth_rate_per_s"],
                                            time_s=h["time_days"] * 86400.0, today_speed_hz=25.0,
                                            today_amp_1x=0.25)

        t_fit = timed(fit, 3)
        t_eval = timed(lambda args=args, theta=theta: wf._negloglik(theta, *args), 50)
        r = fit()
        print(f"{n:>8}{t_fit:>10.3f}{t_eval:>22.6f}{t_fit / t_eval:>12.0f}{r.status:>10}{r.f0_hz:>10.4f}"
              f"{r.zeta:>9.5f}{r.k_per_unit:>8.4f}")
    simulator_table()
    return 0


def simulator_table() -> None:
    """Time per simulated record (16 s at 8192 Hz) against drawing the same number of normal deviates."""
    from analysis.sim.simulate import KINDS, simulate

    n = int(16 * 8192)
    floor = timed(lambda: np.random.default_rng(0).standard_normal(n), 20)
    print(f"\nSimulator: one 16 s record at 8192 Hz ({n} samples); floor = {n} normal deviates "
          f"({floor * 1e3:.2f} ms)")
    print(f"{'kind':<22}{'ms per record':>14}{'x floor':>10}{'records/s':>11}")
    cases = [(k, {}) for k in KINDS] + [("two-mode (exact ODE)", {"method": "ode"})]
    for name, params in cases:
        kind = name.split(" ")[0]
        t = timed(lambda kind=kind, params=params: simulate(kind, seed=1, **params), 3)
        print(f"{name:<22}{t * 1e3:>14.1f}{t / floor:>10.1f}{1 / t:>11.1f}")


if __name__ == "__main__":
    raise SystemExit(main())
