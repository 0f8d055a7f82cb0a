"""`halfwatch analyze FILE...`: analyse records and print what was found.

One file: the full summary (or ``--json``: the result object). Several files or a folder (a technician's
route readings): one process for all, one summary line per file (or ``--csv`` / ``--json`` one row per
file), a progress bar on stderr when it is a terminal; a file that cannot be analysed gets an error row
and the batch goes on; the exit code is 2 when any file failed.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from server.cli import UsageError

#: extensions a folder is searched for (the readers' formats, analysis/record/io.py)
RECORD_EXTENSIONS = (".wav", ".csv", ".tsv", ".uff", ".unv", ".uf")


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "analyze",
        help="analyse accelerometer records (WAV, CSV or UFF-58) for subharmonic onset",
        description="Analyse accelerometer records: 1X, half-order / sub-synchronous detection with a "
        "stated false-alarm probability, growth rate with a 95 % interval, overall velocity r.m.s., "
        "ISO 20816 zone. Give one file for the full summary, or several files / folders for one line "
        "per file (exit code 2 if any file failed).",
    )
    p.add_argument(
        "files", nargs="+", metavar="FILE",
        help="records (.wav, .csv as time,accel or accel, .uff/.unv dataset 58) or folders of them "
        "(searched with their subfolders)",
    )
    p.add_argument(
        "--units", choices=["g", "m/s2", "mm/s2"], help="acceleration units (default: from file, else g)"
    )
    p.add_argument(
        "--sample-rate", type=float, metavar="HZ", help="sample rate, for a CSV without a time column"
    )
    speed = p.add_mutually_exclusive_group()
    speed.add_argument("--forcing-hz", type=float, metavar="HZ",
                       help="exact 1X (tachometer or drive), Hz; one of --forcing-hz, --nominal-hz or "
                       "--tach-channel is needed")
    speed.add_argument("--nominal-hz", type=float, metavar="HZ", help="nominal 1X, refined within ±5%%, Hz")
    p.add_argument("--tach-channel", type=int, metavar="N",
                   help="channel (counted from 1) holding tachometer pulses; the acceleration is the first "
                   "other channel. Order tracking then follows the pulses; a bad tach fails the file")
    p.add_argument("--pulses-per-rev", type=int, default=1, metavar="P",
                   help="tach pulses per shaft revolution (default 1: a once-per-revolution mark)")
    p.add_argument("--tach-level", type=float, metavar="LEVEL",
                   help="tach trigger level in the channel's unit (default: halfway up the pulses)")
    p.add_argument(
        "--machine-group", type=int, choices=[1, 2], default=2, help="ISO 20816-3 group (default 2)"
    )
    p.add_argument(
        "--foundation", choices=["rigid", "flexible"], default="rigid", help="support (default rigid)"
    )
    out = p.add_mutually_exclusive_group()
    out.add_argument("--json", action="store_true",
                     help="one file: print its result as one JSON object; several: one JSON object per line "
                     "(file, ok, result or error)")
    out.add_argument("--csv", action="store_true",
                     help="print a CSV table, one row per file (main measures, error for a failed file)")
    p.set_defaults(func=run)


def _fmt(v, spec: str = ".3g", none: str = "-") -> str:
    return none if v is None else format(v, spec)


def _growth_text(g: dict, s: dict, units: str) -> str:
    if g["state"] == "not-estimated":
        return f"growth not estimated ({g['note']})"
    lo, hi = g["ci95_per_s"]
    text = f"{g['state']} {g['rate_per_s']:.2g} /s [{lo:.2g}, {hi:.2g}] (95 %)"
    if g["state"] == "growing":
        from analysis.record.conditioning import velocity_mm_s

        text += f", doubling every {g['doubling_time_s']:.2g} s"
        if g["onset_s"] is not None:
            text += f", out of the floor near {g['onset_s']:.1f} s"
        v_end = velocity_mm_s(g["end_accel_peak"], s["frequency_hz"], units)
        if v_end is not None:
            text += f", {v_end:.2g} mm/s peak at {g['fit_window_s'][1]:.1f} s"
    return text


def summary(d: dict) -> str:
    """Human-readable summary in the words of the trade."""
    f, s, g, o = d["forcing"], d["subharmonic"], d["growth"], d["overall"]
    src = {
        "given": "given",
        "refined": f"refined from nominal {_fmt(f['nominal_hz'], '.4g')} Hz",
        "nominal": "nominal, no 1X line found near it",
    }[f["source"]]
    lines = [
        f"record: {d['n_samples']} samples at {d['sample_rate_hz']:g} Hz ({d['duration_s']:.1f} s), "
        f"{d['units']}",
        f"1X: {f['frequency_hz']:.4g} Hz ({f['frequency_hz'] * 60:.0f} r/min, {src})",
    ]
    if f.get("tracking", "none") != "none":  # order tracking (analysis/record/orders.py)
        how = "tachometer pulses" if f["tracking"] == "tach" else "the record's own 1X phase"
        lines.append(
            f"  speed moved {_fmt(f['speed_min_hz'], '.4g')}-{_fmt(f['speed_max_hz'], '.4g')} Hz within the "
            f"record: order-tracked from {how}; lines are read in orders, 1X above is the mean speed"
        )
    if s["detected"]:
        name = {
            "half-order": "half-order component",
            "subharmonic": "subharmonic component (0.5X or whirl: take a longer reading)",
        }.get(s["class"], "sub-synchronous component")
        fam = [k for k, v in s["family"].items() if v is not None]
        lines.append(
            f"{name} at {s['frequency_hz']:.4g} Hz ({s['order']:.2f}X), "
            f"{_fmt(s['velocity_rms_mm_s'], '.2g')} mm/s r.m.s. "
            f"= {_fmt(s['velocity_peak_mm_s'], '.2g')} mm/s peak "
            f"({_fmt(s['accel_peak'], '.3g')} {d['units']} peak) "
            f"averaged over the record, {s['snr_db']:.1f} dB over the floor "
            f"(threshold {s['threshold_db']:.1f} dB at Pfa {s['pfa']:g})"
            + (f"; family lines {', '.join(fam)}" if fam else "")
        )
        lines.append("  " + _growth_text(g, s, d["units"]))
    else:
        lines.append(
            f"no subharmonic detected (threshold {s['threshold_db']:.1f} dB over the floor "
            f"at Pfa {s['pfa']:g})"
        )
    lines.append(
        f"overall {o['velocity_rms_mm_s']:.2f} mm/s r.m.s. ({o['band_hz'][0]:g}-{o['band_hz'][1]:g} Hz), "
        + (f"zone {o['zone']} (group {o['machine_group']}, {o['foundation']}; "
           f"limits {'/'.join(f'{v:g}' for v in o['zone_limits_rms_mm_s'])} "
           "mm/s r.m.s., from memory of ISO 10816-3 / 20816-3)" if o["zone"] else
           "no zone graded: the sample rate does not reach the top of the ISO 20816 band (1000 Hz)")
    )
    lines.append(
        "1X {} mm/s r.m.s., 2X {} mm/s r.m.s.; crest factor {}, kurtosis {}".format(
            _fmt(d["orders"]["1X"]["velocity_rms_mm_s"], ".2f"),
            _fmt(d["orders"]["2X"]["velocity_rms_mm_s"], ".2f"),
            _fmt(d["waveform"]["crest_factor"], ".2f"),
            _fmt(d["waveform"]["kurtosis"], ".2f"),
        )
    )
    if d["tones"]:
        lines.append(
            "other tones: "
            + ", ".join(f"{t['order']:.2f}X ({t['frequency_hz']:.4g} Hz)" for t in d["tones"][:6])
        )
    if d["quality"]["flags"]:
        lines.append("data quality: " + ", ".join(d["quality"]["flags"]))
    for note in d["quality"].get("notes") or ():
        lines.append("  " + note)
    lines.append(
        "Condition monitoring only, not a protection or trip system; site rules, the manufacturer's limits "
        "and local codes come first."
    )
    return "\n".join(lines)


def record_files(paths: list[str]) -> list[Path]:
    """The files named, and the record files inside the folders named (sorted, with subfolders)."""
    out: list[Path] = []
    for name in paths:
        path = Path(name)
        if path.is_dir():
            out += sorted(f for f in path.rglob("*") if f.is_file() and f.suffix.lower() in RECORD_EXTENSIONS)
        else:
            out.append(path)  # a missing file fails on its own row with the reader's message
    return out


def analyse_file(path: Path, args: argparse.Namespace) -> dict:
    """The result dict of one file (SignalError for a bad file, bad tach or bad signal)."""
    from analysis import SignalError, analyze_record
    from analysis.record.io import read_any
    from analysis.record.tach import pulses_from_channel

    rec = read_any(str(path), str(path), units=args.units, sample_rate_hz=args.sample_rate,
                   tach_channel=args.tach_channel)
    pulses = None
    if rec.tach is not None:
        pulses = pulses_from_channel(rec.tach, rec.fs_hz, level=args.tach_level)
    elif args.forcing_hz is None and args.nominal_hz is None:
        raise SignalError("give the speed: --forcing-hz, --nominal-hz or --tach-channel", field="forcing_hz")
    return analyze_record(rec.samples, rec.fs_hz, units=rec.units, forcing_hz=args.forcing_hz,
                          nominal_hz=args.nominal_hz, machine_group=args.machine_group,
                          foundation=args.foundation, tach_pulses_s=pulses,
                          pulses_per_rev=args.pulses_per_rev).to_dict()


#: the columns of ``--csv`` (dotted keys of the result dict; units in the names)
CSV_COLUMNS = ("forcing.frequency_hz", "forcing.tracking", "subharmonic.detected", "subharmonic.class",
               "subharmonic.order", "subharmonic.accel_peak", "subharmonic.velocity_rms_mm_s",
               "growth.state", "growth.rate_per_s", "overall.velocity_rms_mm_s", "overall.zone")


def _get(d: dict, dotted: str):
    value: object = d
    for key in dotted.split("."):
        value = value.get(key) if isinstance(value, dict) else None
    return value


def line(name: str, d: dict) -> str:
    """One summary line of a batch."""
    f, s, g, o = d["forcing"], d["subharmonic"], d["growth"], d["overall"]
    parts = [f"1X {f['frequency_hz']:.4g} Hz"
             + (f" (order-tracked, {f['tracking']})" if f.get("tracking", "none") != "none" else "")]
    if s["detected"]:
        parts.append(f"{s['class']} {s['order']:.2f}X {_fmt(s['velocity_rms_mm_s'], '.2g')} mm/s r.m.s."
                     + (f" ({g['state']} {g['rate_per_s']:.2g} /s)" if g["state"] != "not-estimated" else ""))
    else:
        parts.append("no subharmonic")
    parts.append(f"overall {o['velocity_rms_mm_s']:.2f} mm/s r.m.s. zone {o['zone'] or 'not graded'}")
    if d["quality"]["flags"]:
        parts.append("quality: " + ", ".join(d["quality"]["flags"]))
    return f"{name}: " + "; ".join(parts)


class Progress:
    """A one-line progress bar on stderr, drawn only when stderr is a terminal."""

    def __init__(self, total: int, stream=None) -> None:
        self.stream = stream or sys.stderr
        self.total, self.on = total, total > 1 and self.stream.isatty()

    def show(self, done: int, name: str) -> None:
        if self.on:
            filled = int(30 * done / self.total)
            self.stream.write(f"\r[{'#' * filled}{'.' * (30 - filled)}] {done}/{self.total} {name[-30:]:<30}")
            self.stream.flush()

    def close(self) -> None:
        if self.on:
            self.stream.write("\r" + " " * 80 + "\r")
            self.stream.flush()


def run(args: argparse.Namespace) -> int:
    from analysis import SignalError

    if args.tach_channel is None and (args.tach_level is not None or args.pulses_per_rev != 1):
        raise UsageError("--pulses-per-rev and --tach-level need --tach-channel N (the file's tach channel)")
    files = record_files(args.files)
    if not files:
        raise UsageError(f"no record files ({', '.join(RECORD_EXTENSIONS)}) in {', '.join(args.files)}")
    if len(files) == 1 and not Path(args.files[0]).is_dir() and not args.csv:
        try:
            one = analyse_file(files[0], args)
        except SignalError as exc:
            raise UsageError(f"{files[0]}: {exc}") from None
        print(json.dumps(one) if args.json else summary(one))
        return 0
    writer = None
    if args.csv:
        import csv

        from server.audit import csv_cell

        writer = csv.writer(sys.stdout, lineterminator="\n")
        writer.writerow(["file", "ok", "error", *CSV_COLUMNS])
    bar, failed = Progress(len(files)), 0
    for i, path in enumerate(files):
        bar.show(i, str(path))
        d: dict | None
        error: str | None
        field: str | None
        try:
            d, error, field = analyse_file(path, args), None, None
        except SignalError as exc:
            d, error, field = None, str(exc), exc.field
        except Exception as exc:  # one broken file must not stop the batch; the row says what happened
            d, error, field = None, f"could not be analysed ({type(exc).__name__}: {exc})", None
        failed += d is None
        if writer is not None:
            values = [_get(d, c) for c in CSV_COLUMNS] if d else [None] * len(CSV_COLUMNS)
            writer.writerow([csv_cell(v) for v in (str(path), d is not None, error, *values)])
        elif args.json:
            row = {"file": str(path), "ok": d is not None}
            row.update({"result": d} if d is not None else {"error": {"message": error, "field": field}})
            print(json.dumps(row))
        else:
            print(f"{path}: FAILED: {error}" if d is None else line(str(path), d))
        sys.stdout.flush()
    bar.show(len(files), "")
    bar.close()
    print(f"{len(files) - failed} of {len(files)} files analysed, {failed} failed", file=sys.stderr)
    return 2 if failed else 0
