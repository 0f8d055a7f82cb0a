"""Coverage of the operating-window fit's stated 95 % intervals on invented histories with a known tongue.

    .venv/bin/python bench/window_coverage.py [--trials 200] [--records 600]

For each trial a history is drawn by analysis.sim_history (true f0 12.4 Hz, zeta 0.012, k 0.25) and fitted;
the table gives, per case, how often the stated 95 % interval of f0 and of zeta covered the truth, the
exact binomial 95 % interval of that rate (Clopper-Pearson, scipy.stats.binomtest) and the two-sided
p-value against the nominal 0.95, the median interval width, and the median time of one fit.
Cases: labels only (what the dashboard fits), labels with within-record growth rates, and the same
history read 6 times a day (dependent readings, analysis.sim_history.repeat_readings) fitted with the
reading times (readings of one day form a cluster) and without them (every reading taken as independent,
which is what the model-based Hessian alone assumes).
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from analysis.physics.window import fit_operating_window  # noqa: E402
from analysis.sim.sim_history import repeat_readings, simulate_history  # noqa: E402

TRUTH = {"f0_hz": 12.4, "zeta": 0.012, "k": 0.25}


def run_case(trials: int, records: int, growth: bool, seed0: int, *, per_day: int = 1,
             with_times: bool = True) -> dict:
    hit_f0 = hit_z = used = 0
    widths_f0, widths_z, times = [], [], []
    for i in range(trials):
        h = simulate_history(records, seed=seed0 + i, **TRUTH)
        if per_day > 1:
            h = repeat_readings(h, per_day, seed=seed0 + i)
        t0 = time.perf_counter()
        fit = fit_operating_window(h["speed_hz"], h["amp_1x"], h["present"],
                                   growth_rate_per_s=h["growth_rate_per_s"] if growth else None,
                                   time_s=h["time_days"] * 86400.0 if with_times else None,
                                   today_speed_hz=25.0, today_amp_1x=0.25)
        times.append(time.perf_counter() - t0)
        if fit.f0_hz_ci95 is None or fit.zeta_ci95 is None:
            continue  # no interval stated: counted in "no interval", never as covered
        used += 1
        lo, hi = fit.f0_hz_ci95
        hit_f0 += lo <= TRUTH["f0_hz"] <= hi
        widths_f0.append(hi - lo)
        zlo, zhi = fit.zeta_ci95
        hit_z += zlo <= TRUTH["zeta"] <= zhi
        widths_z.append(zhi - zlo)
    return {"used": used, "hit_f0": hit_f0, "hit_z": hit_z, "w_f0": statistics.median(widths_f0),
            "w_z": statistics.median(widths_z), "t": statistics.median(times), "trials": trials}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trials", type=int, default=200)
    ap.add_argument("--records", type=int, default=600)
    args = ap.parse_args()
    print(f"{args.trials} trials x {args.records} records; truth f0 12.4 Hz, zeta 0.012; nominal 0.95")
    print(f"{'case':<26}{'param':<6}{'covered':>10}{'rate':>7}{'exact 95 % CI':>17}{'p vs 0.95':>11}"
          f"{'median width':>14}{'no interval':>13}{'fit s':>8}")
    cases = (("labels only", False, 1, True), ("labels + growth", True, 1, True),
             ("x6 a day, days clustered", True, 6, True), ("x6 a day, no times", True, 6, False))
    for name, growth, per_day, with_times in cases:
        r = run_case(args.trials, args.records, growth, 5000, per_day=per_day, with_times=with_times)
        for par, hits, width in (("f0", r["hit_f0"], f"{r['w_f0']:.3f} Hz"), ("zeta", r["hit_z"],
                                                                              f"{r['w_z']:.4f}")):
            bt = stats.binomtest(hits, r["used"], 0.95)
            ci = bt.proportion_ci(0.95, method="exact")
            print(f"{name:<26}{par:<6}{hits:>5}/{r['used']:<4}{hits / r['used']:>7.3f}"
                  f"{ci.low:>9.3f}-{ci.high:.3f}{bt.pvalue:>11.3f}{width:>14}{r['trials'] - r['used']:>13}"
                  f"{r['t']:>8.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
