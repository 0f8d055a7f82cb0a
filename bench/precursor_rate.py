"""Decay rate γ− of a noise-excited 0.5X bump below threshold: the spectral half-power width (π × width,
an upper bound when the bump is not resolved) against the slow flow locked to the 1X phase
(analysis/record/slow_flow.py), on simulated records (analysis.simulate 'parametric' below threshold).

    .venv/bin/python bench/precursor_rate.py [--seeds 6] [--duration-s 300]
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))


def main(argv=None) -> int:
    from analysis.record.pipeline import analyze_record
    from analysis.record.slow_flow import estimate
    from analysis.sim.simulate import simulate

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=6)
    ap.add_argument("--duration-s", type=float, default=300.0)
    args = ap.parse_args(argv)
    fs, fw = 320.0, 16.5
    print(f"{args.seeds} records of {args.duration_s:g} s at {fs:g} Hz, 1X {fw} Hz, mode at 0.5X; "
          "median |error| / truth and median estimate / truth")
    print(f"{'zeta':>6}{'h/h_c':>7}{'truth 1/s':>11}{'width: med/true':>17}{'|err|':>8}"
          f"{'slow flow: med/true':>21}{'|err|':>8}{'found':>7}{'s/record':>10}")
    for zeta in (0.01, 0.02):
        for ratio in (0.4, 0.6, 0.8):
            spec, flow, truth, took = [], [], None, []
            for seed in range(args.seeds):
                rec = simulate("parametric", seed=seed, fs_hz=fs, duration_s=args.duration_s, forcing_hz=fw,
                               ratio=ratio, zeta=zeta, pre_ratio=1.0)
                truth = rec.truth["precursor"]["narrow_rate_per_s"]
                an = analyze_record(rec.samples, fs, units="g", forcing_hz=fw)
                p = an.subharmonic.precursor
                if p is None or p.width_hz is None:
                    continue
                spec.append(math.pi * p.width_hz)  # the spectral estimate (before)
                t0 = time.perf_counter()
                f = estimate(rec.samples, fs, fw, math.pi * p.width_hz)
                took.append(time.perf_counter() - t0)
                if f is not None:
                    flow.append(f.narrow_rate_per_s)
            s, fl = np.array(spec) / truth, np.array(flow) / truth
            print(f"{zeta:>6}{ratio:>7}{truth:>11.3f}{np.median(s):>17.2f}{np.median(abs(s - 1)):>8.2f}"
                  f"{np.median(fl) if fl.size else float('nan'):>21.2f}"
                  f"{np.median(abs(fl - 1)) if fl.size else float('nan'):>8.2f}{fl.size:>4}/{len(spec):<2}"
                  f"{np.median(took) if took else float('nan'):>10.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
