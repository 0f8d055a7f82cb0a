#!/usr/bin/env python3
"""A small sensor-gateway script: publish vibration records to halfwatch over MQTT (QoS 1).

It needs only numpy and paho-mqtt (no halfwatch install), as on a gateway box. Each record is a
file of raw little-endian float32 samples (``.f32``) or a one-column text/CSV file, or a generated
demo record (``--demo N``: an invented pump signal, for trying the link). The script subscribes to
the reply topic first, publishes every record with QoS 1, waits until the broker has acknowledged
each one and the bridge has replied, prints one line per reply, and exits 1 if any was rejected.

    python examples/gateway_publish.py --host broker.local --topic halfwatch/Riverside/12/records \\
        --fs-hz 2560 --units m/s2 --speed-hz 24.75 rec-0001.f32 rec-0002.f32
    python examples/gateway_publish.py --topic halfwatch/Riverside/12/records --demo 3 --binary

Records carry a ``client_ref`` (file name + start time by default), so publishing the same record
again, or a redelivery after a broker restart, is stored once.
"""

from __future__ import annotations

import argparse
import base64
import datetime as dt
import json
import sys
import threading
import time
from pathlib import Path

import numpy as np


def demo_record(i: int, *, fs_hz: float, n: int, speed_hz: float) -> np.ndarray:
    """Invented demo signal: 1X tone, a slowly rising 0.5X line, and noise (m/s2)."""
    rng = np.random.default_rng(1000 + i)
    t = np.arange(n) / fs_hz
    half = 0.05 * (1 + i)
    x = 0.6 * np.sin(2 * np.pi * speed_hz * t) + half * np.sin(np.pi * speed_hz * t + 0.4)
    return (x + 0.02 * rng.standard_normal(n)).astype("<f4")


def read_samples(path: Path) -> np.ndarray:
    if path.suffix.lower() in (".f32", ".raw", ".bin"):
        return np.fromfile(path, dtype="<f4")
    return np.loadtxt(path, delimiter="," if path.suffix.lower() == ".csv" else None, ndmin=1,
                      dtype=np.float64).astype("<f4")


def payload(samples: np.ndarray, meta: dict, *, binary: bool) -> bytes:
    """JSON form (base64 float32) or binary form (JSON header, NUL byte, raw float32)."""
    x = np.ascontiguousarray(samples, dtype="<f4")
    if binary:
        return json.dumps(meta, separators=(",", ":")).encode() + b"\x00" + x.tobytes()
    doc = {**meta, "samples_b64": base64.b64encode(x.tobytes()).decode("ascii")}
    return json.dumps(doc, separators=(",", ":")).encode()


class Gateway:
    def __init__(self, args):
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion

        self.args = args
        self.replies: dict[str, dict] = {}
        self.acked: set[int] = set()  # message ids the broker acknowledged (PUBACK)
        self.ready = threading.Event()
        self.lock = threading.Lock()
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=args.client_id or "")
        if args.username:
            self.client.username_pw_set(args.username, args.password)
        if args.tls or args.ca_file:
            self.client.tls_set(ca_certs=args.ca_file)
        self.client.on_connect = self._on_connect
        self.client.on_subscribe = lambda *a: self.ready.set()
        self.client.on_message = self._on_message
        self.client.on_publish = self._on_publish
        self.client.reconnect_delay_set(1, 8)

    def _on_connect(self, client, userdata, flags, reason_code, properties):
        if reason_code.is_failure:
            print(f"broker refused the connection: {reason_code}", file=sys.stderr)
            return
        client.subscribe(self.args.reply_topic, qos=1)

    def _on_publish(self, client, userdata, mid, reason_code, properties):
        with self.lock:
            self.acked.add(mid)

    def _on_message(self, client, userdata, msg):
        try:
            reply = json.loads(msg.payload)
        except ValueError:
            return
        ref = reply.get("client_ref")
        if ref:
            with self.lock:
                self.replies[ref] = reply

    def run(self, records: list[tuple[str, np.ndarray, dict]]) -> int:
        a = self.args
        self.client.connect_async(a.host, a.port, keepalive=30)
        self.client.loop_start()
        try:
            if not self.ready.wait(a.timeout_s):
                print("no subscription to the reply topic; is the broker reachable?", file=sys.stderr)
                return 1
            infos = []
            for _, samples, meta in records:
                infos.append(self.client.publish(a.topic, payload(samples, meta, binary=a.binary), qos=1))
                if a.interval_s:
                    time.sleep(a.interval_s)
            # A message published while the link is down stays queued in paho and is sent (again)
            # after the reconnect; its PUBACK arrives through on_publish with the same message id.
            mids = [info.mid for info in infos]
            refs = [meta.get("client_ref", name) for name, _, meta in records]
            deadline = time.monotonic() + a.timeout_s
            while time.monotonic() < deadline:
                with self.lock:
                    done = all(m in self.acked for m in mids) and (
                        a.no_wait_replies or all(r in self.replies for r in refs))
                if done:
                    break
                time.sleep(0.05)
            return self._report(refs, mids)
        finally:
            self.client.disconnect()
            self.client.loop_stop()

    def _report(self, refs, mids) -> int:
        failed = 0
        for ref, mid in zip(refs, mids, strict=True):
            reply = self.replies.get(ref)
            if mid not in self.acked:
                print(f"{ref}: not acknowledged by the broker", file=sys.stderr)
                failed += 1
            elif self.args.no_wait_replies:
                print(f"{ref}: published")
            elif reply is None:
                print(f"{ref}: no reply from halfwatch", file=sys.stderr)
                failed += 1
            elif reply.get("ok"):
                print(f"{ref}: stored as record {reply['record_id']}" + ("" if reply["created"] else
                                                                         " (already stored)"))
            else:
                err = reply.get("error", {})
                print(f"{ref}: rejected ({err.get('field')}): {err.get('message')}", file=sys.stderr)
                failed += 1
        return 1 if failed else 0


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("files", nargs="*", type=Path, help=".f32 (raw float32) or one-column .csv/.txt files")
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=1883)
    p.add_argument("--topic", required=True, help="e.g. halfwatch/<site>/<point id>/records")
    p.add_argument("--reply-topic", default=None, help="default: <topic>/reply")
    p.add_argument("--client-id", default=None)
    p.add_argument("--username", default=None)
    p.add_argument("--password", default=None)
    p.add_argument("--tls", action="store_true")
    p.add_argument("--ca-file", default=None)
    p.add_argument("--fs-hz", type=float, default=2560.0, help="sample rate, Hz")
    p.add_argument("--units", default="m/s2", help="g, m/s2 or mm/s2")
    p.add_argument("--speed-hz", type=float, default=None, help="shaft speed, rev/s (from a tachometer)")
    p.add_argument("--measured-at", default=None, help="ISO 8601 start of the first record (default: now)")
    p.add_argument("--spacing-s", type=float, default=60.0, help="time between successive records")
    p.add_argument("--demo", type=int, default=0, help="publish N generated demo records instead of files")
    p.add_argument("--samples", type=int, default=16384, help="samples per demo record")
    p.add_argument("--ref-prefix", default="gw", help="prefix of the client_ref of each record")
    p.add_argument("--no-ref", action="store_true",
                   help="send no client_ref (the bridge derives one; replies cannot be matched, so the "
                   "script only waits for the broker's acknowledgements)")
    p.add_argument("--binary", action="store_true", help="binary form (JSON header, NUL, raw float32)")
    p.add_argument("--interval-s", type=float, default=0.0, help="pause between publishes")
    p.add_argument("--timeout-s", type=float, default=60.0)
    p.add_argument("--no-wait-replies", action="store_true")
    args = p.parse_args(argv)
    args.reply_topic = args.reply_topic or f"{args.topic}/reply"
    args.no_wait_replies = args.no_wait_replies or args.no_ref
    if not args.files and not args.demo:
        p.error("give record files or --demo N")
    start = (dt.datetime.fromisoformat(args.measured_at) if args.measured_at
             else dt.datetime.now(dt.UTC).replace(microsecond=0))
    if start.tzinfo is None:
        p.error("--measured-at needs a zone, e.g. 2026-03-01T08:00:00Z")
    sources = [(f.name, read_samples(f)) for f in args.files]
    speed = args.speed_hz or 24.75
    sources += [(f"demo{i}", demo_record(i, fs_hz=args.fs_hz, n=args.samples, speed_hz=speed))
                for i in range(args.demo)]
    records = []
    for i, (name, samples) in enumerate(sources):
        when = (start + dt.timedelta(seconds=i * args.spacing_s)).isoformat().replace("+00:00", "Z")
        meta = {"fs_hz": args.fs_hz, "units": args.units, "measured_at": when}
        if not args.no_ref:
            meta["client_ref"] = f"{args.ref_prefix}-{name}-{when}"
        if args.speed_hz:
            meta["speed_hz"] = args.speed_hz
        records.append((name, samples, meta))
    return Gateway(args).run(records)


if __name__ == "__main__":
    sys.exit(main())
