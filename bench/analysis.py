"""Benchmark: analyze_record against a naive floor measured in the same run.

For records of 8,192 / 65,536 / 262,144 samples, prints the median time of ``analyze_record`` and of a naive
floor (one scipy.signal.welch at the same segment length + one numpy.fft.rfft + one scipy.signal.hilbert of
the same record), interleaved, their ratio, and the peak traced memory of analyze_record relative to the
record's float64 size (tracemalloc). Goals (issue 2): ratio <= 3 at 65,536 samples, memory <= 10x.
A second table times order tracking (issue 12): the same record with its speed ramping 4 %, analysed
tracked (the rule fires: shaft phase from the record, resampling, analysis in orders) and untracked (the
rule switched off), against the same naive floor; goal: tracked <= 3x the naive floor at 65,536 samples.

    .venv/bin/python bench/analysis.py [--repeats 31] [--part all|orders]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
from scipy import signal

# This file is named like the package it measures: drop bench/ from the path so "analysis" is the package.
_HERE = Path(__file__).resolve().parent
sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != _HERE] + [str(_HERE.parent)]

from analysis import analyze_record, pipeline  # noqa: E402
from analysis.record.spectrum import choose_nperseg  # noqa: E402

FS, F1 = 2560.0, 29.6


def make_record(n: int, seed: int = 0) -> np.ndarray:
    """Demo scenario: a steady 1X and 2X, a half-order line growing at 0.2 /s, white noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    x = 0.4 * np.sin(2 * np.pi * F1 * t) + 0.08 * np.sin(2 * np.pi * 2 * F1 * t + 1.0)
    x += 0.03 * np.exp(0.2 * (t - t[-1])) * np.sin(np.pi * F1 * t + 0.4)
    return x + 0.01 * rng.standard_normal(n)


def make_ramped(n: int, ramp: float = 0.04, seed: int = 0) -> np.ndarray:
    """The same scenario with the shaft speed ramping by ``ramp`` over the record (0.5X locked to it)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    dur = n / FS
    theta = 2 * np.pi * F1 * ((1 - ramp / 2) * t + 0.5 * ramp * t * t / dur)
    x = 0.4 * np.sin(theta) + 0.08 * np.sin(2 * theta + 1.0)
    x += 0.03 * np.exp(0.2 * (t - t[-1])) * np.sin(0.5 * theta + 0.4)
    return x + 0.01 * rng.standard_normal(n)


def steady(x: np.ndarray) -> None:
    analyze_record(x, FS, units="g", nominal_hz=F1)


def untracked(x: np.ndarray) -> None:
    saved = pipeline.TRACK_BINS
    pipeline.TRACK_BINS = float("inf")
    try:
        analyze_record(x, FS, units="g", nominal_hz=F1)
    finally:
        pipeline.TRACK_BINS = saved


def tracked(x: np.ndarray) -> None:
    analyze_record(x, FS, units="g", nominal_hz=F1)


def orders_table(repeats: int) -> None:
    print()
    print(
        "| samples (4 % ramp) | tracked ms | untracked ms | same record at steady speed ms | naive floor ms "
        "| tracked / naive | tracked / steady | tracked peak memory / record |"
    )
    print("|---|---|---|---|---|---|---|---|")
    for n in (65536, 262144):
        x, xs = make_ramped(n), make_record(n)  # xs: the same scenario at a steady speed
        nps, _ = choose_nperseg(n, FS, F1)
        assert analyze_record(x, FS, units="g", nominal_hz=F1).forcing.tracking == "phase"
        tracked(x), untracked(x), steady(xs), naive(x, nps)
        wall: dict[str, list[float]] = {"t": [], "u": [], "s": [], "n": []}
        runs = (("t", tracked, (x,)), ("u", untracked, (x,)), ("s", steady, (xs,)), ("n", naive, (x, nps)))
        for _ in range(repeats):
            for name, fn, fargs in runs:
                t0 = time.perf_counter()
                fn(*fargs)
                wall[name].append(time.perf_counter() - t0)
        mt, mu, ms, mn = (statistics.median(wall[k]) for k in ("t", "u", "s", "n"))
        mem = peak_memory(tracked, x) / x.nbytes
        print(
            f"| {n:,} | {mt * 1e3:.1f} | {mu * 1e3:.1f} | {ms * 1e3:.1f} | {mn * 1e3:.2f} | {mt / mn:.2f} "
            f"| {mt / ms:.2f} | {mem:.1f}x |"
        )


def naive(x: np.ndarray, nperseg: int) -> None:
    signal.welch(x, FS, window="hann", nperseg=nperseg)
    np.fft.rfft(x)
    signal.hilbert(x)


def ours(x: np.ndarray) -> None:
    analyze_record(x, FS, units="g", forcing_hz=F1)


def peak_memory(fn, *args) -> int:
    tracemalloc.start()
    tracemalloc.reset_peak()
    fn(*args)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=31)
    ap.add_argument("--part", choices=("all", "orders"), default="all")
    args = ap.parse_args()
    if args.part == "orders":
        print(f"order tracking, fs = {FS:g} Hz, mean 1X = {F1} Hz, medians of {args.repeats} interleaved")
        orders_table(args.repeats)
        print(f"load average: {os.getloadavg()[0]:.2f} (2 cores; above ~1 other work shares the machine)")
        return
    print(
        f"analyze_record vs naive floor, fs = {FS:g} Hz, 1X = {F1} Hz, medians of {args.repeats} interleaved"
    )
    print()
    print(
        "| samples | nperseg | analyze_record ms | naive floor ms | ratio (wall) | ratio (CPU) "
        "| peak memory / record | naive memory / record |"
    )
    print("|---|---|---|---|---|---|---|---|")
    for n in (8192, 65536, 262144):
        x = make_record(n)
        nps, _ = choose_nperseg(n, FS, F1)
        ours(x), naive(x, nps)  # warm caches (filter designs, FFT plans)
        wall = {"ours": [], "naive": []}
        cpu = {"ours": [], "naive": []}
        for _ in range(args.repeats):
            for name, fn, fargs in (("ours", ours, (x,)), ("naive", naive, (x, nps))):
                c0, t0 = time.process_time(), time.perf_counter()
                fn(*fargs)
                wall[name].append(time.perf_counter() - t0)
                cpu[name].append(time.process_time() - c0)
        mo, mn = statistics.median(wall["ours"]), statistics.median(wall["naive"])
        co, cn = statistics.median(cpu["ours"]), statistics.median(cpu["naive"])
        mem_ours, mem_naive = peak_memory(ours, x) / x.nbytes, peak_memory(naive, x, nps) / x.nbytes
        print(
            f"| {n:,} | {nps} | {mo * 1e3:.2f} | {mn * 1e3:.2f} | {mo / mn:.2f} | {co / max(cn, 1e-9):.2f} "
            f"| {mem_ours:.1f}x | {mem_naive:.1f}x |"
        )
    orders_table(args.repeats)
    print()
    print(f"load average: {os.getloadavg()[0]:.2f} (2 cores; above ~1 other work shares the machine)")


if __name__ == "__main__":
    main()
