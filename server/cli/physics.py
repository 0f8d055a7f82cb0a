"""``halfwatch stability | window | trend | simulate``: instability physics from the command line.

This module does the file I/O; the numerics live in ``analysis.stability``, ``analysis.window``,
``analysis.trend`` and ``analysis.simulate``. Heavy imports stay inside the functions.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

from server.cli import UsageError

SIM_KINDS = ("healthy", "parametric", "two-mode", "half-order", "whirl", "speed-drift", "history")
HISTORY_COLUMNS = ("time", "speed_hz", "amp_1x", "amp_sub", "present", "growth_rate_per_s")


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "stability",
        help="Floquet growth rate, threshold and margin of one operating point",
        description="Damped Mathieu model of the half-order mode: growth rate (Floquet), "
        "threshold modulation at this detuning, and the margin to onset.",
    )
    p.add_argument("--f0", type=float, required=True, metavar="HZ", help="natural frequency of the mode, Hz")
    p.add_argument(
        "--zeta", type=float, required=True, metavar="Z", help="damping ratio of the mode (0 to 1)"
    )
    p.add_argument("--forcing-hz", type=float, required=True, metavar="HZ", help="forcing (1X) frequency, Hz")
    p.add_argument("--modulation", type=float, required=True, metavar="H", help="modulation depth h (>= 0)")
    p.add_argument("--json", action="store_true", help="print the facts as JSON")
    p.set_defaults(func=cmd_stability)

    p = subparsers.add_parser(
        "window",
        help="fit the operating window (unstable speed band) from a history CSV",
        description="Fit the instability tongue in (speed, 1X amplitude) to the records of "
        "one measurement point. CSV columns: " + ",".join(HISTORY_COLUMNS),
    )
    p.add_argument("history", metavar="HISTORY.csv", help="one row per reading (see docs/api.md)")
    p.add_argument("--speed-hz", type=float, help="today's 1X frequency (default: the latest record)")
    p.add_argument("--amp-1x", type=float, help="today's 1X amplitude (default: the latest record)")
    p.add_argument(
        "--present-above",
        type=float,
        metavar="VALUE",
        help="without a present column: a record counts as present when amp_sub > VALUE",
    )
    p.add_argument("--json", action="store_true", help="print the facts as JSON")
    p.set_defaults(func=cmd_window)

    p = subparsers.add_parser(
        "trend",
        help="growth of the subharmonic across records and time to a limit",
        description="Robust exponential/linear trend of the subharmonic amplitude of one "
        "point, model choice, onset date and time until --limit.",
    )
    p.add_argument("history", metavar="HISTORY.csv", help="one row per reading (see docs/api.md)")
    p.add_argument(
        "--limit",
        type=float,
        required=True,
        metavar="VALUE",
        help="alarm level in the units of the amp_sub column",
    )
    p.add_argument("--column", default="amp_sub", help="column to trend (default amp_sub)")
    p.add_argument(
        "--speed-tolerance",
        type=float,
        default=0.03,
        metavar="FRACTION",
        help="compare like with like: keep records within this fraction of the latest speed (0.03)",
    )
    p.add_argument("--json", action="store_true", help="print the facts as JSON")
    p.set_defaults(func=cmd_trend)

    p = subparsers.add_parser(
        "simulate",
        help="write an invented record (WAV, g) and its truth (JSON sidecar)",
        description="Generate a simulated accelerometer record with known ground truth "
        "(invented data for demos and tests, never a measurement). Writes "
        "FILE.wav (float32, units g) and FILE.json (the truth).",
    )
    p.add_argument("kind", choices=SIM_KINDS,
                   help="what the record carries (healthy: 1X 0.04 g peak and harmonics, zone B)")
    p.add_argument("--out", required=True, metavar="FILE.wav", help="WAV file to write")
    p.add_argument("--seed", type=int, default=0, help="random seed: the same seed gives the same record (0)")
    p.add_argument("--fs-hz", type=float, default=8192.0, help="sample rate, Hz (8192)")
    p.add_argument("--duration-s", type=float, default=16.0, help="record length, s (16)")
    p.add_argument("--forcing-hz", type=float, default=24.75, help="1X frequency, Hz (24.75)")
    p.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        help="kind parameter, repeatable (e.g. --set ratio=1.4 --set zeta=0.02); see README",
    )
    p.set_defaults(func=cmd_simulate)


def _print_json(obj) -> None:
    json.dump(obj, sys.stdout, indent=2, allow_nan=False, default=_json_default)
    sys.stdout.write("\n")


def _json_default(o):
    import numpy as np

    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def _fmt(v, spec=".4g", none="-") -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return none
    return format(v, spec)


def cmd_stability(args: argparse.Namespace) -> int:
    from analysis.physics.stability import stability_summary

    try:
        s = stability_summary(args.f0, args.zeta, args.forcing_hz, args.modulation).to_dict()
    except ValueError as exc:
        raise UsageError(
            str(exc)
            .replace("f0_hz", "--f0")
            .replace("forcing_hz", "--forcing-hz")
            .replace("zeta ", "--zeta ")
            .replace("modulation ", "--modulation ")
        ) from exc
    if args.json:
        _print_json(s)
        return 0
    lam = s["growth_rate_per_s"]
    print(
        f"mode f0 {s['f0_hz']:g} Hz, zeta {s['zeta']:g}; forcing {s['forcing_hz']:g} Hz "
        f"(ratio {s['forcing_hz'] / s['f0_hz']:.4f}); modulation h = {s['modulation']:g}"
    )
    state = "GROWING" if lam > 0 else "decaying (below threshold)"
    print(f"growth rate (Floquet)     {lam:+.5g} 1/s  ({s['growth_db_per_s']:+.3g} dB/s)  {state}")
    if s["doubling_time_s"] is not None:
        print(f"amplitude doubles every   {s['doubling_time_s']:.3g} s")
    print(f"growth rate (first order) {s['growth_rate_first_order_per_s']:+.5g} 1/s")
    print(
        f"threshold h_c (Floquet)   {_fmt(s['threshold_modulation'], '.6g', 'none below h = 2')}"
        f"   (first order {s['threshold_first_order']:.6g})"
    )
    print(f"h / h_c                   {_fmt(s['ratio_to_threshold_pct'], '.1f')} %")
    print(
        f"margin to onset           {_fmt(s['margin_pct'], '+.1f')} %  (100 (1 - h/h_c); negative = beyond)"
    )
    print("Model result for condition monitoring; not a protection limit.")
    return 0


def read_history(path: str) -> dict:
    """Read a history CSV into column arrays; raise UsageError naming the row and column on bad values."""
    import csv

    import numpy as np

    p = Path(path)
    if not p.is_file():
        raise UsageError(f"{path}: no such file")
    with p.open(newline="", encoding="utf-8-sig") as fh:
        reader = csv.DictReader(fh)
        if reader.fieldnames is None:
            raise UsageError(f"{path}: empty file; expected a header row with {','.join(HISTORY_COLUMNS)}")
        names = [n.strip() for n in reader.fieldnames]
        if "time" not in names:
            raise UsageError(f"{path}: missing column 'time' (header: {','.join(names)})")
        cols: dict[str, list] = {n: [] for n in names}
        for lineno, row in enumerate(reader, start=2):
            for raw_name, value in row.items():
                if raw_name is None:
                    raise UsageError(f"{path} line {lineno}: more values than header columns")
                cols[raw_name.strip()].append((value or "").strip())
    out: dict = {"time_days": _parse_times(cols["time"], path)}
    for name in ("speed_hz", "amp_1x", "amp_sub", "growth_rate_per_s"):
        if name in cols:
            out[name] = _floats(cols[name], name, path)
    for name in names:
        if name not in out and name not in ("time", "present"):
            out[name] = _floats(cols[name], name, path, strict=False)
    if "present" in cols:
        out["present"] = np.array([_flag(v, i, path) for i, v in enumerate(cols["present"], start=2)])
    return out


def _parse_times(values: list[str], path: str):
    import numpy as np

    days = []
    for i, v in enumerate(values, start=2):
        if not v:
            raise UsageError(
                f"{path} line {i}: time is empty; give ISO 8601 (2026-03-01T08:00:00) or unix seconds"
            )
        try:
            days.append(float(v) / 86400.0)  # unix seconds
            continue
        except ValueError:
            pass
        try:
            t = np.datetime64(v.replace("Z", "").replace("z", ""), "s")
        except ValueError as exc:
            raise UsageError(
                f"{path} line {i}: time {v!r} is neither ISO 8601 (2026-03-01T08:00:00) nor unix seconds"
            ) from exc
        days.append(t.astype("int64") / 86400.0)
    return np.array(days, dtype=float)


def _floats(values: list[str], name: str, path: str, *, strict: bool = True):
    import numpy as np

    out = []
    for i, v in enumerate(values, start=2):
        if v == "" or v.lower() in ("nan", "na", "none"):
            out.append(np.nan)
            continue
        try:
            out.append(float(v))
        except ValueError as exc:
            if not strict:
                return None
            raise UsageError(f"{path} line {i}: column {name} has {v!r}, expected a number or empty") from exc
    return np.array(out, dtype=float)


def _flag(v: str, line: int, path: str):
    s = v.lower()
    if s in ("1", "true", "yes", "y", "present"):
        return 1.0
    if s in ("0", "false", "no", "n", "absent"):
        return 0.0
    if s == "":
        return math.nan
    raise UsageError(f"{path} line {line}: column present has {v!r}, expected 1/0, true/false or empty")


def cmd_window(args: argparse.Namespace) -> int:
    import numpy as np

    from analysis.physics.window import conclusion, fit_operating_window

    h = read_history(args.history)
    if "present" not in h and args.present_above is not None and h.get("amp_sub") is not None:
        import numpy as np

        sub = h["amp_sub"]
        h["present"] = np.where(np.isfinite(sub), (sub > args.present_above).astype(float), np.nan)
    for need in ("speed_hz", "amp_1x", "present"):
        if need not in h:
            raise UsageError(
                f"{args.history}: the window fit needs column {need!r} (columns: {','.join(HISTORY_COLUMNS)}"
                + ("; or give --present-above with an amp_sub column)" if need == "present" else ")")
            )
    growth = h.get("growth_rate_per_s")
    last = int(np.argmax(h["time_days"]))
    today_speed = args.speed_hz if args.speed_hz is not None else float(h["speed_hz"][last])
    today_amp = args.amp_1x if args.amp_1x is not None else float(h["amp_1x"][last])
    try:
        fit = fit_operating_window(
            h["speed_hz"],
            h["amp_1x"],
            h["present"],
            growth_rate_per_s=growth,
            time_s=h["time_days"] * 86400.0,
            today_speed_hz=today_speed,
            today_amp_1x=today_amp,
        )
    except ValueError as exc:
        raise UsageError(str(exc)) from exc
    d = fit.to_dict()
    if args.json:
        _print_json(d)
        return 0
    print(f"operating-window fit over {d['n_records']} records ({d['n_present']} with the half-order line)")
    print(f"status: {d['status']}  {d['message']}")
    if d["f0_hz"] is not None:
        print(f"mode f0        {d['f0_hz']:.4g} Hz  (+- {_fmt(d['f0_hz_se'], '.2g')})")
        print(f"damping zeta   {d['zeta']:.3g}  (+- {_fmt(d['zeta_se'], '.2g')})")
        print(f"scale k        {d['k_per_unit']:.4g} per unit of 1X  (+- {_fmt(d['k_per_unit_se'], '.2g')})")
    print(f"today: speed {today_speed:g} Hz, 1X amplitude {today_amp:g}")
    if d["amp_threshold"] is not None:
        print(
            f"1X threshold at today's speed  {d['amp_threshold']:.4g}  "
            f"(95 %: {_fmt(d['amp_threshold_lo'])} to {_fmt(d['amp_threshold_hi'])})"
        )
    if d["margin_pct"] is not None:
        print(
            f"margin to onset  {d['margin_pct']:+.1f} %  (95 %: {_fmt(d['margin_pct_lo'], '+.1f')} to "
            f"{_fmt(d['margin_pct_hi'], '+.1f')}); today's 1X is {d['ratio_to_threshold_pct']:.1f} % "
            "of the threshold"
        )
    band = d["unstable_band_hz"]
    if band is not None:
        print(f"unstable speed band at today's amplitude  {band[0]:.4g} to {band[1]:.4g} Hz")
    elif d["f0_hz"] is not None:
        print("no unstable speed band at today's amplitude")
    said = conclusion(fit, today_amp, today_speed, h["speed_hz"], units="units of the amp_1x column")
    print(said.text)
    print(said.skip_text)
    print(said.caution)
    return 0


def cmd_trend(args: argparse.Namespace) -> int:
    from analysis.physics.trend import fit_trend

    h = read_history(args.history)
    col = args.column
    if col not in h or h[col] is None:
        raise UsageError(f"{args.history}: no numeric column {col!r} to trend")
    if not (args.limit > 0 and math.isfinite(args.limit)):
        raise UsageError(f"--limit must be a positive number, got {args.limit}")
    try:
        res = fit_trend(
            h["time_days"],
            h[col],
            limit=args.limit,
            speed_hz=h.get("speed_hz"),
            speed_tolerance=args.speed_tolerance,
        )
    except ValueError as exc:
        raise UsageError(str(exc)) from exc
    d = res.to_dict()
    if args.json:
        _print_json(d)
        return 0
    print(
        f"trend of {col}: {d['n_used']} of {d['n_total']} records used "
        f"({d['n_other_speed']} at other speeds, {d['n_outliers']} outliers)"
    )
    print(f"status: {d['status']}  {d['message']}")
    if d["model"] is not None:
        scores = ", ".join(f"{k} {_fmt(v, '.1f')}" for k, v in d["aicc"].items())
        print(f"model: {d['model']}  (AICc {scores})")
    if d["growth_db_per_day"] is not None:
        print(
            f"growth {d['growth_db_per_day']:+.3g} dB/day  "
            f"(95 %: {_fmt(d['growth_db_per_day_lo'], '+.3g')} to "
            f"{_fmt(d['growth_db_per_day_hi'], '+.3g')})"
        )
    if d["slope_per_day"] is not None:
        print(f"linear slope {d['slope_per_day']:+.4g} per day")
    if d["onset_day"] is not None:
        print(f"onset (change point) {d['onset_iso']}")
    if d["days_to_limit"] is not None:
        print(
            f"reaches {args.limit:g} in {d['days_to_limit']:.1f} days ({d['limit_iso']}); 90 %: "
            f"{_fmt(d['days_to_limit_lo'], '.1f')} to "
            f"{_fmt(d['days_to_limit_hi'], '.1f', 'not bounded')} days"
        )
    print("Forecast for maintenance planning; not a protection limit.")
    return 0


def _param_value(text: str):
    try:
        return int(text)
    except ValueError:
        pass
    try:
        return float(text)
    except ValueError:
        return text


#: what ``halfwatch simulate KIND`` sets unless ``--set`` says otherwise: a healthy machine reads in ISO
#: 20816-3 zone B at the default speed (1X 0.04 g peak at 24.75 Hz is 1.8 mm/s r.m.s.), not the simulator's
#: default background, whose strong 1X (0.2 g peak) suits records that carry a fault.
CLI_PRESETS: dict[str, dict[str, float]] = {
    "healthy": {"amp_1x_g": 0.04, "amp_2x_g": 0.016, "amp_3x_g": 0.006}}


def cmd_simulate(args: argparse.Namespace) -> int:
    import numpy as np
    from scipy.io import wavfile

    from analysis.sim.simulate import simulate

    params: dict = dict(CLI_PRESETS.get(args.kind, {}))
    for item in args.set:
        name, sep, value = item.partition("=")
        if not sep or not name.strip():
            raise UsageError(f"--set takes NAME=VALUE, got {item!r}")
        params[name.strip()] = _param_value(value.strip())
    out = Path(args.out)
    if not out.parent.is_dir():
        raise UsageError(f"--out: folder {out.parent} does not exist")
    if args.kind == "history":
        return _simulate_history(out, args.seed, params)
    if out.suffix.lower() != ".wav":
        raise UsageError(f"--out must name a .wav file, got {args.out}")
    try:
        rec = simulate(
            args.kind,
            seed=args.seed,
            fs_hz=args.fs_hz,
            duration_s=args.duration_s,
            forcing_hz=args.forcing_hz,
            **params,
        )
    except ValueError as exc:
        raise UsageError(str(exc)) from exc
    if not float(args.fs_hz).is_integer():
        raise UsageError(f"--fs-hz must be a whole number of Hz for a WAV file, got {args.fs_hz}")
    wavfile.write(out, int(args.fs_hz), rec.samples.astype(np.float32))
    side = out.with_suffix(".json")
    truth = dict(rec.truth, wav_file=out.name)
    side.write_text(
        json.dumps(truth, indent=2, allow_nan=False, default=_json_default) + "\n", encoding="utf-8"
    )
    sub = rec.truth["subharmonic"]
    print(f"wrote {out} ({rec.samples.size} samples at {rec.fs_hz:g} Hz, units g) and {side.name}")
    print(
        f"kind {args.kind}: class {sub['class']}"
        + (f", {sub['frequency_hz']:.4g} Hz" if sub["frequency_hz"] else "")
    )
    print("Invented data from the simulator; not a measurement.")
    return 0


def _simulate_history(out: Path, seed: int, params: dict) -> int:
    """Write an invented history CSV (the columns of HISTORY_COLUMNS) and its truth as JSON."""
    import numpy as np

    from analysis.sim.sim_history import simulate_history

    if out.suffix.lower() != ".csv":
        raise UsageError(f"--out must name a .csv file for kind history, got {out}")
    n = params.pop("n", 300)
    if "speed_lo_hz" in params or "speed_hi_hz" in params:
        params["speed_range_hz"] = (
            float(params.pop("speed_lo_hz", 20.0)),
            float(params.pop("speed_hi_hz", 30.0)),
        )
    try:
        h = simulate_history(int(n), seed=seed, **params)
    except (TypeError, ValueError) as exc:
        raise UsageError(str(exc).replace("simulate_history() got an", "history:")) from exc
    lines = [",".join(HISTORY_COLUMNS)]
    for i in range(h["time_days"].size):
        iso = str(np.datetime64(int(round(h["time_days"][i] * 86400.0)), "s"))
        g = h["growth_rate_per_s"][i]
        lines.append(
            f"{iso},{h['speed_hz'][i]:.4f},{h['amp_1x'][i]:.5g},{h['amp_sub'][i]:.5g},"
            f"{int(h['present'][i])},{'' if np.isnan(g) else f'{g:.4g}'}"
        )
    out.write_text("\n".join(lines) + "\n", encoding="utf-8")
    side = out.with_suffix(".json")
    side.write_text(json.dumps(dict(h["truth"], csv_file=out.name), indent=2) + "\n", encoding="utf-8")
    print(f"wrote {out} ({h['time_days'].size} records) and {side.name}")
    print("Invented history from the simulator; not measurements.")
    return 0
