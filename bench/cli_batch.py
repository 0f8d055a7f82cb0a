"""A folder of route readings through `halfwatch analyze`: one process per file against one process for all.

Invented readings (a route of N WAV files, 8 s at 2560 Hz, 1X 24.75 Hz, some with a 0.5X line). Prints a
table: wall time for the folder both ways, time per file, the ratio, and the start-up share (one
process per file minus the batch, per file). Times are wall clock on this machine, in one run.

    .venv/bin/python bench/cli_batch.py [--files 12]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy.io import wavfile

SCRIPT = Path(sys.executable).with_name("halfwatch")
FS, F1 = 2560, 24.75


def write_route(folder: Path, n: int) -> list[Path]:
    rng = np.random.default_rng(7)
    t = np.arange(8 * FS) / FS
    paths = []
    for i in range(n):
        x = 0.4 * np.sin(2 * np.pi * F1 * t) + 0.01 * rng.standard_normal(t.size)
        if i % 3 == 0:
            x += 0.05 * np.sin(np.pi * F1 * t + 0.3)
        path = folder / f"stop_{i:02d}.wav"
        wavfile.write(path, FS, x.astype(np.float32))
        paths.append(path)
    return paths


def timed(args: list[str]) -> float:
    t0 = time.perf_counter()
    subprocess.run([str(SCRIPT), "analyze", *args], check=False, capture_output=True)
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--files", type=int, default=12, help="readings in the invented route (default 12)")
    n = ap.parse_args().files
    with tempfile.TemporaryDirectory() as tmp:
        paths = write_route(Path(tmp), n)
        single = sum(timed([str(p), "--nominal-hz", str(F1)]) for p in paths)
        batch = timed([tmp, "--nominal-hz", str(F1)])
    load = os.getloadavg()[0]
    print(f"{n} readings, 8 s at {FS} Hz each; load average {load:.1f} on {os.cpu_count()} cores")
    print(f"{'way':<28}{'total s':>10}{'s per file':>12}")
    print(f"{'one process per file':<28}{single:>10.2f}{single / n:>12.2f}")
    print(f"{'one process for the folder':<28}{batch:>10.2f}{batch / n:>12.2f}")
    print(f"{'ratio (per file / batch)':<28}{single / batch:>10.2f}")
    print(f"{'start-up saved per file, s':<28}{(single - batch) / max(n - 1, 1):>10.2f}")


if __name__ == "__main__":
    main()
