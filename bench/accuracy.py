"""Simulator-vs-analysis accuracy: how well analyze_record recovers class, frequency, amplitude and growth.

Runs the analysis core on invented records with known truth (analysis.simulate) over many seeds and prints:
detection rate vs SNR, false alarms on the kinds without a half-order line, frequency/amplitude errors on
steady lines, and the growth-rate error distribution on growing records (with rows per family of a steady line
that starts growing part-way through the record).

    .venv/bin/python bench/accuracy.py [--seeds 30] [--part all|orders]

``--part orders`` runs only the order-tracking and short-reading tables (speed-ramp and ramp-whirl kinds,
before = tracking switched off, after = on; readings of 16-60 cycles of 1X).

SNR here is the line's power over the broadband noise in a 1 Hz band (A^2/2 / N0), from the record's truth.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from analysis.record import pipeline  # noqa: E402
from analysis.record.pipeline import analyze_record  # noqa: E402
from analysis.sim.sim_scoring import growth_case, score  # noqa: E402
from analysis.sim.simulate import simulate  # noqa: E402

FS, DUR, FW, NOISE = 8192.0, 16.0, 24.75, 0.02


def run(kind: str, seed: int, **params) -> dict:
    rec = simulate(kind, seed=seed, fs_hz=FS, duration_s=DUR, forcing_hz=FW, **params)
    res = analyze_record(rec.samples, rec.fs_hz, units="g", forcing_hz=rec.truth["forcing_hz"]).to_dict()
    return score(rec.truth, res)


def amp_for_snr(snr_db: float) -> float:
    n0 = NOISE**2 / (FS / 2.0)
    return math.sqrt(2.0 * n0 * 10 ** (snr_db / 10.0))


def pct(x: float) -> str:
    return f"{100 * x:5.1f} %"


def table(title: str, header: list[str], rows: list[list[str]]) -> None:
    print(f"\n{title}")
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(header)]
    print("  ".join(h.rjust(w) for h, w in zip(header, widths, strict=True)))
    for r in rows:
        print("  ".join(c.rjust(w) for c, w in zip(r, widths, strict=True)))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=30)
    ap.add_argument("--part", choices=("all", "orders"), default="all")
    args = ap.parse_args()
    seeds = range(1000, 1000 + args.seeds)
    t_start = time.perf_counter()
    print(
        f"records: fs {FS:g} Hz, {DUR:g} s, 1X {FW} Hz, broadband noise {NOISE} g r.m.s.; "
        f"{args.seeds} seeds a cell"
    )
    if args.part == "orders":
        orders_tables(seeds)
        print(f"\n(total {time.perf_counter() - t_start:.0f} s)")
        return 0

    rows = []
    for snr in (-12.0, -9.0, -6.0, -3.0, 0.0, 3.0, 6.0, 10.0):
        amp = amp_for_snr(snr)
        sc = [run("half-order", s, sub_amp_g=amp) for s in seeds]
        det = np.mean([r["detected"] for r in sc])
        cls = np.mean([r["class_ok"] for r in sc])
        ferr = [abs(r["freq_err_hz"]) for r in sc if r["freq_err_hz"] is not None]
        rows.append(
            [f"{snr:+.0f}", f"{amp:.2e}", pct(det), pct(cls), f"{np.median(ferr):.4f}" if ferr else "-"]
        )
    table(
        "Detection of a steady 0.5X line (half-order kind) vs SNR in 1 Hz",
        ["SNR dB", "amp g", "detected", "class ok", "median |df| Hz"],
        rows,
    )

    rows = []
    cases = (
        ("healthy", {}, "any"),
        ("speed-drift", {}, "any"),
        ("whirl", {}, "half-order"),
        ("parametric", {"ratio": 0.7}, "any"),
        ("parametric", {"ratio": 0.7, "floor_g": 3e-4}, "any"),
    )
    for kind, params, wrong in cases:
        sc = [run(kind, s, **params) for s in seeds]
        if wrong == "any":
            fa = np.mean([r["detected"] for r in sc])
            label = "detected (false alarm)"
        else:
            fa = np.mean([r["class"] == "half-order" for r in sc])
            label = "called half-order"
        name = kind if not params else f"{kind} h/h_c 0.7, mode {params.get('floor_g', 0.002) * 1e3:g} mg rms"
        rows.append(
            [
                name,
                label,
                pct(fa),
                pct(np.mean([r["class_ok"] for r in sc])),
                pct(np.mean([r.get("precursor", False) for r in sc])),
            ]
        )
    table("False alarms", ["kind", "counted as", "rate", "class ok", "precursor reported"], rows)

    rows = []
    for kind in ("half-order", "whirl"):
        sc = [run(kind, s) for s in seeds]
        ae = np.array([r["amp_rel_err"] for r in sc if r["amp_rel_err"] is not None])
        fe = np.array([r["freq_err_hz"] for r in sc if r["freq_err_hz"] is not None])
        rows.append(
            [
                kind,
                pct(np.mean([r["class_ok"] for r in sc])),
                f"{np.median(ae):+.3f}",
                f"{np.quantile(np.abs(ae), 0.9):.3f}",
                f"{np.sqrt(np.mean(fe**2)):.4f}",
            ]
        )
    table(
        "Steady lines at default amplitude (0.03 g half-order, 0.04 g whirl)",
        ["kind", "class ok", "median amp err", "p90 |amp err|", "rms df Hz"],
        rows,
    )

    rows = []
    for ratio in (1.3, 1.6, 2.0, 2.5):
        sc = [run("parametric", s, **growth_case(ratio, duration_s=DUR, forcing_hz=FW)) for s in seeds]
        _growth_row(rows, f"parametric h/h_c {ratio}", sc)
    sc = [run("two-mode", s, ratio=2.0, onset_s=1.6, start_rel=1e-3) for s in seeds]
    _growth_row(rows, "two-mode F/F_c 2 (slow flow)", sc)
    for steady in (True, False):
        for sat in (False, True):
            sc = [run("onset-growth", s, **onset_case(s, steady, sat)) for s in seeds]
            before = "steady line" if steady else "no line"
            name = f"onset part-way, {before} before, {'levels off' if sat else 'no levelling'}"
            _growth_row(rows, name, sc)
    table(
        "Growth rate within a record: relative error vs the Floquet exponent (onset rows: vs the set rate)",
        ["case", "estimated", "median err", "p10", "p90", "|err| < 10 %", "CI covers"],
        rows,
    )
    orders_tables(seeds)
    print(f"\n(total {time.perf_counter() - t_start:.0f} s)")
    return 0


#: ramped-record families: (label, kind, params); the negatives carry fixed tones at 0.53X and 0.62X of
#: the mean speed (13.1 and 15.3 Hz), which move in orders as the speed moves
RAMP_FAMILIES = (
    ("0.5X, ramp 1.6 %", "speed-ramp", {"change_pct": 1.6}),
    ("0.5X, ramp 3 %", "speed-ramp", {"change_pct": 3.0}),
    ("0.5X, ramp 8 %", "speed-ramp", {"change_pct": 8.0}),
    ("0.5X, step 5 %", "speed-ramp", {"change_pct": 5.0, "profile": "step"}),
    ("0.5X, swing 5 %", "speed-ramp", {"change_pct": 5.0, "profile": "swing"}),
    ("0.5X at 20 dB in 1 Hz, ramp 5 %", "speed-ramp", {"change_pct": 5.0, "sub_amp_g": amp_for_snr(20.0)}),
    ("whirl 0.42-0.46X, ramp 5 %", "ramp-whirl", {"change_pct": 5.0}),
    ("whirl at 20 dB in 1 Hz, ramp 5 %", "ramp-whirl", {"change_pct": 5.0, "sub_amp_g": amp_for_snr(20.0)}),
    (
        "none + fixed tones, ramp 5 %",
        "speed-ramp",
        {"change_pct": 5.0, "sub_amp_g": 0.0, "fixed_tone_hz": (13.1, 15.3)},
    ),
)


def _run_ramp(kind: str, seed: int, tracking: bool, **params) -> tuple[dict, dict]:
    rec = simulate(kind, seed=seed, fs_hz=FS, duration_s=DUR, forcing_hz=FW, **params)
    saved = pipeline.TRACK_BINS
    pipeline.TRACK_BINS = saved if tracking else math.inf  # "before": the rule never fires
    try:
        res = analyze_record(rec.samples, rec.fs_hz, units="g", nominal_hz=FW).to_dict()
    finally:
        pipeline.TRACK_BINS = saved
    return score(rec.truth, res) | {"truth_order": rec.truth["subharmonic"]["order"]}, res


def orders_tables(seeds) -> None:
    """Order tracking before/after on ramped records, and readings of 16-60 cycles of 1X."""
    rows = []
    for label, kind, params in RAMP_FAMILIES:
        for tracking in (False, True):
            out = [_run_ramp(kind, s, tracking, **params) for s in seeds]
            sc = [o[0] for o in out]
            present = sc[0]["present"]
            oe = [
                abs(o[1]["subharmonic"]["order"] - (o[0]["truth_order"] or 0.5))
                for o in out
                if o[0]["detected"] and o[1]["subharmonic"]["order"] is not None
            ]
            ae = [abs(r["amp_rel_err"]) for r in sc if r["amp_rel_err"] is not None]
            rows.append(
                [
                    label,
                    "after" if tracking else "before",
                    pct(np.mean([o[1]["forcing"]["tracking"] != "none" for o in out])),
                    pct(np.mean([r["detected"] for r in sc])) if present else "-",
                    pct(np.mean([r["class_ok"] for r in sc])),
                    pct(np.mean([r["class"] == "half-order" for r in sc])) if not present else "-",
                    f"{np.median(oe):.4f}" if oe else "-",
                    f"{np.median(ae):.3f}" if ae else "-",
                    f"{np.quantile(ae, 0.9):.3f}" if ae else "-",
                ]
            )
    table(
        "Order tracking on ramped records (0.5X 0.03 g locked to the shaft, about 37 dB in 1 Hz; 1X nominal)",
        [
            "family",
            "",
            "tracked",
            "found",
            "class ok",
            "false 0.5X",
            "median |order err|",
            "median |amp err|",
            "p90 |amp err|",
        ],
        rows,
    )

    rows = []
    for cycles in (16, 24, 40, 60):
        for kind in ("half-order", "whirl"):
            refused, sc = 0, []
            for s in seeds:
                rec = simulate(kind, seed=s, fs_hz=FS, duration_s=cycles / FW + 2 / FS, forcing_hz=FW)
                try:
                    res = analyze_record(rec.samples, rec.fs_hz, units="g", forcing_hz=FW).to_dict()
                except Exception:  # noqa: BLE001 - a refusal is what this table counts
                    refused += 1
                    continue
                sc.append(score(rec.truth, res) | {"klass": res["subharmonic"]["class"]})
            rows.append(
                [
                    f"{cycles}",
                    kind,
                    f"{refused}/{len(seeds)}",
                    pct(np.mean([r["detected"] for r in sc])) if sc else "-",
                    pct(np.mean([r["class_ok"] for r in sc])) if sc else "-",
                    pct(np.mean([r["klass"] == "subharmonic" for r in sc])) if sc else "-",
                    pct(
                        np.mean(
                            [
                                r["klass"] not in (r["truth_class"], "subharmonic") and r["detected"]
                                for r in sc
                            ]
                        )
                    )
                    if sc
                    else "-",
                ]
            )
    table(
        "Short readings (one segment below 50 cycles; 0.03 g half-order / 0.04 g whirl at 16 s-record noise)",
        ["cycles of 1X", "kind", "refused", "found", "class ok", "'subharmonic' (either)", "wrong class"],
        rows,
    )


def onset_case(seed: int, steady: bool, sat: bool) -> dict:
    """Parameters of an ``onset-growth`` record: onset at 20-80 % of the record, rate log-uniform within
    0.1-3 /s but bounded so the line grows 2-6 nepers after the onset (5-9 from below the noise without a
    steady line) unless it levels off (then 4 nepers over its start)."""
    rng = np.random.default_rng(50_000 + seed)
    frac = float(rng.uniform(0.2, 0.8))
    span = (1 - frac) * DUR
    g_lo, g_hi = (2.0, 6.0) if steady else (5.0, 9.0)
    lo, hi = max(0.1, g_lo / span), 3.0 if sat else min(3.0, g_hi / span)
    lam = float(np.exp(rng.uniform(np.log(lo), np.log(max(hi, lo)))))
    a0 = 0.02 if steady else 1e-4
    p = {"growth_per_s": lam, "onset_s": frac * DUR, "sub_amp_g": a0 if steady else 0.0}
    if not steady:
        p["seed_amp_g"] = a0
    if sat:
        p["sat_amp_g"] = a0 * math.exp(4.0 if steady else 8.0)
    return p


def _growth_row(rows, name, sc) -> None:
    ge = np.array([r["growth_rel_err"] for r in sc if r["growth_rel_err"] is not None])
    cov = [r["growth_ci_covers"] for r in sc if r["growth_ci_covers"] is not None]
    if ge.size == 0:
        rows.append([name, "0", "-", "-", "-", "-", "-"])
        return
    rows.append(
        [
            name,
            f"{ge.size}/{len(sc)}",
            f"{np.median(ge):+.3f}",
            f"{np.quantile(ge, 0.1):+.3f}",
            f"{np.quantile(ge, 0.9):+.3f}",
            pct(np.mean(np.abs(ge) < 0.1)),
            pct(np.mean(cov)),
        ]
    )


if __name__ == "__main__":
    raise SystemExit(main())
