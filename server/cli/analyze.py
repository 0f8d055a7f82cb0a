"""`halfwatch analyze FILE`: analyse one record and print what was found."""

from __future__ import annotations

import argparse
import json

from server.cli import UsageError


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "analyze",
        help="analyse one accelerometer record (WAV, CSV or UFF-58) for subharmonic onset",
        description="Analyse one accelerometer record: 1X, half-order / sub-synchronous detection with a "
        "stated false-alarm probability, growth rate with a 95 % interval, overall velocity r.m.s., "
        "ISO 20816 zone.",
    )
    p.add_argument(
        "file", metavar="FILE", help="record: .wav, .csv (time,accel or accel) or .uff (dataset 58)"
    )
    p.add_argument(
        "--units", choices=["g", "m/s2", "mm/s2"], help="acceleration units (default: from file, else g)"
    )
    p.add_argument(
        "--sample-rate", type=float, metavar="HZ", help="sample rate, for a CSV without a time column"
    )
    speed = p.add_mutually_exclusive_group(required=True)
    speed.add_argument("--forcing-hz", type=float, metavar="HZ", help="exact 1X (tachometer or drive), Hz")
    speed.add_argument("--nominal-hz", type=float, metavar="HZ", help="nominal 1X, refined within ±5%%, Hz")
    p.add_argument(
        "--machine-group", type=int, choices=[1, 2], default=2, help="ISO 20816-3 group (default 2)"
    )
    p.add_argument(
        "--foundation", choices=["rigid", "flexible"], default="rigid", help="support (default rigid)"
    )
    p.add_argument("--json", action="store_true", help="print one JSON object instead of the summary")
    p.set_defaults(func=run)


def _fmt(v, spec: str = ".3g", none: str = "-") -> str:
    return none if v is None else format(v, spec)


def _growth_text(g: dict, s: dict, units: str) -> str:
    if g["state"] == "not-estimated":
        return f"growth not estimated ({g['note']})"
    lo, hi = g["ci95_per_s"]
    text = f"{g['state']} {g['rate_per_s']:.2g} /s [{lo:.2g}, {hi:.2g}] (95 %)"
    if g["state"] == "growing":
        from analysis.conditioning import velocity_mm_s

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
    if s["detected"]:
        name = "half-order component" if s["class"] == "half-order" else "sub-synchronous component"
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
        f"zone {o['zone']} (group {o['machine_group']}, {o['foundation']}; "
        f"limits {'/'.join(f'{v:g}' for v in o['zone_limits_rms_mm_s'])} "
        "mm/s r.m.s., from memory of ISO 10816-3 / 20816-3)"
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
    lines.append(
        "Condition monitoring only, not a protection or trip system; site rules, the manufacturer's limits "
        "and local codes come first."
    )
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    from analysis import SignalError, analyze_record
    from analysis.io import read_any

    try:
        rec = read_any(args.file, args.file, units=args.units, sample_rate_hz=args.sample_rate)
        result = analyze_record(
            rec.samples,
            rec.fs_hz,
            units=rec.units,
            forcing_hz=args.forcing_hz,
            nominal_hz=args.nominal_hz,
            machine_group=args.machine_group,
            foundation=args.foundation,
        )
    except SignalError as exc:
        raise UsageError(f"{args.file}: {exc}") from None
    d = result.to_dict()
    print(json.dumps(d) if args.json else summary(d))
    return 0
