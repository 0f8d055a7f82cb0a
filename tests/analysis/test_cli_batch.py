"""`halfwatch analyze` on many files in one process, and with a tach channel, through the console script.

The records are invented (a route of three readings); their truth is set by construction: a 0.5X line of
0.05 g peak at half of a 1X of 29.6 Hz, or no 0.5X line at all.
"""

from __future__ import annotations

import csv
import io
import json
import os
import pty
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import signal
from scipy.io import wavfile

SCRIPT = Path(sys.executable).with_name("halfwatch")
FS = 2560


def _run(*args, **kw):
    return subprocess.run([str(SCRIPT), "analyze", *map(str, args)], capture_output=True, text=True,
                          timeout=120, **kw)


class _Out:
    def __init__(self, code, captured):
        self.returncode, self.stdout, self.stderr = code, captured.out, captured.err


@pytest.fixture
def inproc(capsys):
    """The same dispatcher the console script calls, in this process (saves a start-up per call)."""
    from server.cli import main

    def run(*args):
        code = main(["analyze", *map(str, args)])
        return _Out(code, capsys.readouterr())

    return run


@pytest.fixture
def route_folder(tmp_path, make_record):
    folder = tmp_path / "route-2026-11-30"
    (folder / "b-line-2").mkdir(parents=True)
    half = make_record(FS, 4.0, [(29.6, 0.4, 0), (14.8, 0.05, 0)], noise=0.01, seed=3)
    quiet = make_record(FS, 4.0, [(29.6, 0.4, 0)], noise=0.01, seed=4)
    wavfile.write(folder / "a_pump_de.wav", FS, half.astype(np.float32))
    np.savetxt(folder / "b-line-2" / "b_fan_nde.csv", np.column_stack([np.arange(quiet.size) / FS, quiet]),
               delimiter=",", header="time_s,accel_g", comments="")
    (folder / "c_broken.wav").write_bytes(b"not audio at all")
    (folder / "notes.md").write_text("not a record: skipped")
    return folder


def test_folder_batch_one_line_per_file_and_the_exit_code(route_folder):
    out = _run(route_folder, "--forcing-hz", 29.6)
    assert out.returncode == 2  # one file failed (exit 2 = bad input, server/cli/__init__.py)
    lines = out.stdout.strip().splitlines()
    assert len(lines) == 3  # the .md is not a record
    assert lines[0].startswith(str(route_folder / "a_pump_de.wav") + ": 1X 29.6 Hz; half-order 0.50X")
    assert "mm/s r.m.s." in lines[0] and "zone" in lines[0]
    assert "b_fan_nde.csv: 1X 29.6 Hz; no subharmonic" in lines[1]
    assert "c_broken.wav: FAILED: not a readable WAV" in lines[2]
    assert "2 of 3 files analysed, 1 failed" in out.stderr
    assert "\r" not in out.stderr  # no progress bar when stderr is not a terminal


def test_batch_all_good_exits_0(route_folder, inproc):
    (route_folder / "c_broken.wav").unlink()
    out = inproc(route_folder / "a_pump_de.wav", route_folder / "b-line-2", "--forcing-hz", 29.6)
    assert out.returncode == 0, out.stderr
    assert len(out.stdout.strip().splitlines()) == 2


def test_csv_output(route_folder, inproc):
    out = inproc(route_folder, "--forcing-hz", 29.6, "--csv")
    assert out.returncode == 2
    rows = list(csv.DictReader(io.StringIO(out.stdout)))
    assert [Path(r["file"]).name for r in rows] == ["a_pump_de.wav", "b_fan_nde.csv", "c_broken.wav"]
    a, b, c = rows
    assert a["ok"] == "True" and a["subharmonic.class"] == "half-order"
    assert float(a["subharmonic.order"]) == pytest.approx(0.5, abs=0.005)  # 14.8 / 29.6 by construction
    assert float(a["subharmonic.accel_peak"]) == pytest.approx(0.05, rel=0.1)  # 0.05 g peak by construction
    assert b["subharmonic.detected"] == "False" and b["overall.zone"] in "ABCD"
    assert c["ok"] == "False" and "not a readable WAV" in c["error"] and c["overall.zone"] == ""


def test_json_lines_output(route_folder, inproc):
    out = inproc(route_folder, "--nominal-hz", 29.5, "--json")
    rows = [json.loads(line) for line in out.stdout.strip().splitlines()]
    assert [r["ok"] for r in rows] == [True, True, False]
    assert rows[0]["result"]["forcing"]["frequency_hz"] == pytest.approx(29.6, rel=1e-3)
    assert rows[2]["error"]["field"] == "file"


def test_progress_bar_on_a_terminal(route_folder):
    # a pseudo-terminal as stderr (os.openpty): the bar is drawn there, stdout keeps only the lines
    master, slave = pty.openpty()
    try:
        proc = subprocess.run([str(SCRIPT), "analyze", str(route_folder), "--forcing-hz", "29.6"],
                              stdout=subprocess.PIPE, stderr=slave, timeout=120, text=True)
        os.close(slave)
        chunks = []
        while True:
            try:
                data = os.read(master, 4096)
            except OSError:
                break
            if not data:
                break
            chunks.append(data)
    finally:
        os.close(master)
    seen = b"".join(chunks).decode()
    assert proc.returncode == 2
    assert "\r[" in seen and "] 3/3" in seen and "0/3" in seen
    assert "\r" not in proc.stdout


def test_no_record_files_is_a_usage_error(tmp_path, inproc):
    out = inproc(tmp_path, "--forcing-hz", 30)
    assert out.returncode == 2 and "no record files" in out.stderr


def test_every_option_has_help_text():
    from server.cli import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    analyze = sub.choices["analyze"]
    for action in analyze._actions:
        assert action.help and len(action.help) > 10, action.dest


# --- a tach channel beside the acceleration -------------------------------------------------------------

def _tach_wav(path, drop_pulse=False):
    # 1X ramps 28.5 -> 31.5 Hz over 8 s (a run-up, invented); the 0.5X line is locked at half the shaft
    # angle; the tach is scipy.signal.square of the shaft phase (one rising edge per revolution)
    t = np.arange(8 * FS) / FS
    ph = 2 * np.pi * (28.5 * t + 0.5 * 3.0 / 8.0 * t * t)
    noise = 0.002 * np.random.default_rng(2).standard_normal(t.size)
    accel = np.sin(ph) + 0.05 * np.sin(ph / 2 + 0.3) + noise
    tach = (signal.square(ph, duty=0.2) + 1.0) * 2.5
    if drop_pulse:
        tach[(t > 4.01) & (t < 4.01 + 1 / 30)] = 0.0  # one pulse missing (the one near 4.033 s)
    wavfile.write(path, FS, np.column_stack([accel, tach]).astype(np.float32))
    return path


def test_tach_channel_tracks_orders(tmp_path, inproc):
    out = inproc(_tach_wav(tmp_path / "runup.wav"), "--tach-channel", 2, "--json")
    assert out.returncode == 0, out.stderr
    d = json.loads(out.stdout)
    assert d["forcing"]["tracking"] == "tach"
    assert d["forcing"]["frequency_hz"] == pytest.approx(30.0, rel=2e-3)  # mean speed of the linear ramp
    # computed order tracking (Fyfe & Munck 1997, MSSP 11(2)): the locked line is a sharp 0.5-order line
    assert d["subharmonic"]["detected"] and d["subharmonic"]["order"] == pytest.approx(0.5, abs=2e-3)
    text = inproc(tmp_path / "runup.wav", "--tach-channel", 2).stdout
    assert "order-tracked from tachometer pulses" in text and "speed moved 28." in text


def test_batch_with_a_tach_channel_says_order_tracked(tmp_path, inproc):
    _tach_wav(tmp_path / "runup.wav")
    _tach_wav(tmp_path / "runup_bad.wav", drop_pulse=True)
    out = inproc(tmp_path, "--tach-channel", 2)
    assert out.returncode == 2
    good, bad = out.stdout.strip().splitlines()
    assert "runup.wav: 1X 30 Hz (order-tracked, tach); half-order 0.50X" in good
    assert "runup_bad.wav: FAILED: the tach is irregular" in bad


def test_bad_tach_exits_2_with_the_reason(tmp_path, inproc):
    out = inproc(_tach_wav(tmp_path / "runup.wav", drop_pulse=True), "--tach-channel", 2)
    assert out.returncode == 2 and out.stdout == ""
    assert "tach is irregular" in out.stderr and "±25 %" in out.stderr
    out = inproc(_tach_wav(tmp_path / "runup.wav"), "--tach-channel", 3)
    assert out.returncode == 2 and "tach channel 3 is not in this file" in out.stderr
    out = inproc(_tach_wav(tmp_path / "runup.wav"))
    assert out.returncode == 2 and "--tach-channel" in out.stderr
    out = inproc(_tach_wav(tmp_path / "runup.wav"), "--forcing-hz", 30, "--pulses-per-rev", 2)
    assert out.returncode == 2 and "need --tach-channel" in out.stderr
