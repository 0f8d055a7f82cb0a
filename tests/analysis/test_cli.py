"""`halfwatch analyze` end to end, through the installed console script."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.io import wavfile

SCRIPT = Path(sys.executable).with_name("halfwatch")


def _run(*args):
    return subprocess.run(
        [str(SCRIPT), "analyze", *map(str, args)], capture_output=True, text=True, timeout=120
    )


@pytest.fixture
def growing_wav(tmp_path, make_record):
    # a growing half-order component (0.25 /s) under a steady 1X, written by scipy.io.wavfile as float32
    x = make_record(2560.0, 40.0, [(29.6, 0.4, 0), (59.2, 0.08, 0), (14.8, 0.05, 0.25)], noise=0.01, seed=3)
    path = tmp_path / "pump_de.wav"
    wavfile.write(path, 2560, x.astype(np.float32))
    return path


def test_json_reports_growing_half_order(growing_wav):
    out = _run(growing_wav, "--nominal-hz", 30, "--json")
    assert out.returncode == 0, out.stderr
    d = json.loads(out.stdout)
    assert d["forcing"]["source"] == "refined"
    assert d["forcing"]["frequency_hz"] == pytest.approx(29.6, abs=0.01)
    assert d["subharmonic"]["detected"] is True and d["subharmonic"]["class"] == "half-order"
    assert d["growth"]["state"] == "growing"
    lo, hi = d["growth"]["ci95_per_s"]
    assert lo <= 0.25 <= hi and d["growth"]["rate_per_s"] == pytest.approx(0.25, rel=0.05)
    assert d["sample_rate_hz"] == 2560.0 and d["version"] == "2.0"
    # overall velocity r.m.s. at least that of the steady 1X and 2X tones: V_rms = A g / (2 pi f) / sqrt 2
    # for a sine (g = 9.80665 m/s2; the WAV is in g), and the zone is the one of ISO 20816-3 group 2,
    # rigid (A/B 1.4, B/C 2.8, C/D 4.5 mm/s r.m.s., from memory)
    steady = [0.4 * 9.80665e3 / (2 * np.pi * 29.6) / np.sqrt(2), 0.08 * 9.80665e3 / (2 * np.pi * 59.2) /
    np.sqrt(2)]
    v = d["overall"]["velocity_rms_mm_s"]
    assert v >= 0.95 * float(np.hypot(*steady))
    assert d["overall"]["zone"] == ("A" if v < 1.4 else "B" if v < 2.8 else "C" if v < 4.5 else "D")


def test_summary_speaks_the_trade(growing_wav):
    out = _run(growing_wav, "--forcing-hz", 29.6, "--machine-group", 1, "--foundation", "flexible")
    assert out.returncode == 0, out.stderr
    assert "half-order component at 14.8 Hz (0.50X)" in out.stdout
    assert "growing" in out.stdout and "zone" in out.stdout and "not a protection" in out.stdout


def test_bad_file_exits_2_with_one_line(tmp_path):
    bad = tmp_path / "broken.wav"
    bad.write_bytes(b"not audio at all")
    out = _run(bad, "--forcing-hz", 30)
    assert out.returncode == 2 and out.stdout == ""
    assert len(out.stderr.strip().splitlines()) == 1 and "not a readable WAV" in out.stderr


def test_missing_file_and_csv_without_rate_exit_2(tmp_path, capsys):
    # in-process through the same dispatcher the console script calls
    from server.cli import main

    assert main(["analyze", str(tmp_path / "nope.wav"), "--forcing-hz", "30"]) == 2
    assert "check the path" in capsys.readouterr().err
    one = tmp_path / "one.csv"
    one.write_text("\n".join(["0.1", "0.2"] * 4000))
    assert main(["analyze", str(one), "--forcing-hz", "30"]) == 2
    err = capsys.readouterr().err
    assert "--sample-rate" in err and len(err.strip().splitlines()) == 1
    assert main(["analyze", str(one), "--forcing-hz", "30", "--sample-rate", "2560", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["sample_rate_hz"] == 2560.0


def test_help_text_reads_as_written():
    out = subprocess.run([str(SCRIPT), "analyze", "--help"], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0
    text = " ".join(out.stdout.split())
    assert "growth rate with a 95 % interval" in text and "%%" not in text
