"""The MQTT bridge: subscribe, decode, store through the ingestion service, reply, then acknowledge.

Delivery guarantees (MQTT 3.1.1, QoS 1):

- The session is persistent (``clean_session=False`` with a stable client id), so the broker keeps
  the subscription and queues messages while the bridge is down or reconnecting.
- Acknowledgement is manual: a PUBACK goes out only after the record is committed (or the message
  was rejected and the reject published). A crash before that leaves the message unacknowledged,
  and the broker delivers it again; the ingestion service's ``client_ref`` idempotency (derived from
  the record when the gateway sends none) makes the second delivery a no-op.
- Messages are stored by one thread in arrival order and acknowledged in that order, as MQTT asks.
  A message received on an earlier connection is still stored, but never acknowledged on the new
  one (its packet id may belong to another message now); the broker's redelivery is acknowledged.
- A busy or unreachable database is retried with backoff, holding the acknowledgement back.
- Reconnects use paho's backoff (``mqtt_reconnect_min_s`` doubling up to ``mqtt_reconnect_max_s``).
"""

from __future__ import annotations

import json
import logging
import os
import queue
import socket
import threading
import time
import uuid
from dataclasses import dataclass

from server.errors import AppError, error_body
from server.mqtt.payload import decode, derived_ref
from server.mqtt.topics import TopicRule, resolve_point
from server.ops.heartbeat import Heartbeat

log = logging.getLogger("halfwatch.mqtt")

DB_RETRY_MAX_S = 30.0
POINT_CACHE_S = 30.0


@dataclass(frozen=True)
class Inbound:
    topic: str
    payload: bytes
    mid: int
    qos: int
    generation: int


@dataclass(frozen=True)
class Handled:
    stored: bool
    reply: dict
    status: str  # stored | duplicate | rejected


class Bridge:
    """One bridge instance: ``start()``, ``stop()``; ``run(stop_event)`` for the command line."""

    def __init__(self, db, settings):
        from server.services.ingest import Limits

        self.db = db
        self.settings = settings
        self.rule = TopicRule(settings.mqtt_topic)
        self.rule.check_reply_template(settings.mqtt_reply_topic)
        self.limits = Limits.from_settings(settings)
        self.inbox: queue.Queue[Inbound] = queue.Queue()
        self._gen_lock = threading.Lock()
        self.generation = 0
        self.subscribed = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._points: dict[tuple, tuple[float, tuple[int, int | None]]] = {}
        host, pid, tag = socket.gethostname(), os.getpid(), uuid.uuid4().hex[:6]
        instance = f"mqtt:{settings.mqtt_client_id}:{host}:{pid}:{tag}"
        self.heartbeat = Heartbeat(db, instance, "mqtt-bridge", interval_s=settings.heartbeat_s)
        self.client = self._make_client()

    # --- paho client and callbacks (run on paho's network thread) ---------------------------------
    def _make_client(self):
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion, MQTTProtocolVersion

        s = self.settings
        c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=s.mqtt_client_id, clean_session=False,
                        protocol=MQTTProtocolVersion.MQTTv311, manual_ack=True)
        c.reconnect_delay_set(max(1, round(s.mqtt_reconnect_min_s)), max(1, round(s.mqtt_reconnect_max_s)))
        if s.mqtt_username:
            c.username_pw_set(s.mqtt_username, s.mqtt_password.get_secret_value() or None)
        if s.mqtt_tls or s.mqtt_ca_file or s.mqtt_cert_file:
            c.tls_set(ca_certs=s.mqtt_ca_file or None, certfile=s.mqtt_cert_file or None,
                      keyfile=s.mqtt_key_file or None)
            c.tls_insecure_set(s.mqtt_tls_insecure)
        c.on_connect = self._on_connect
        c.on_disconnect = self._on_disconnect
        c.on_subscribe = self._on_subscribe
        c.on_message = self._on_message
        return c

    def _on_connect(self, client, userdata, flags, reason_code, properties):
        if reason_code.is_failure:
            log.error("broker %s:%s refused the connection: %s", self.settings.mqtt_host,
                      self.settings.mqtt_port, reason_code)
            self.heartbeat.count("connect_refused")
            return
        with self._gen_lock:
            self.generation += 1
        self.heartbeat.count("connects")
        log.info("connected to %s:%s (session present: %s); subscribing to %s", self.settings.mqtt_host,
                 self.settings.mqtt_port, flags.session_present, self.rule.filter)
        client.subscribe(self.rule.filter, qos=1)

    def _on_subscribe(self, client, userdata, mid, reason_code_list, properties):
        if any(rc.is_failure for rc in reason_code_list):
            log.error("the broker refused the subscription to %s: %s", self.rule.filter, reason_code_list)
            return
        self.subscribed.set()

    def _on_disconnect(self, client, userdata, flags, reason_code, properties):
        self.subscribed.clear()
        if not self._stop.is_set():
            self.heartbeat.count("disconnects")
            log.warning("disconnected from the broker (%s); reconnecting with backoff", reason_code)

    def _on_message(self, client, userdata, msg):
        with self._gen_lock:
            gen = self.generation
        self.inbox.put(Inbound(msg.topic, bytes(msg.payload), msg.mid, msg.qos, gen))

    # --- storing (one thread, arrival order) ------------------------------------------------------
    def handle(self, item: Inbound) -> Handled | None:
        """Store or reject one message; None if the bridge stopped while the database was away."""
        from sqlalchemy.exc import DBAPIError

        wait = 0.5
        while True:
            try:
                return self._store(item)
            except DBAPIError as exc:
                if not _transient(exc):
                    return self._internal(item, exc)
                log.warning("database unavailable (%s); message on %s held, retrying in %.1f s",
                            exc.orig, item.topic, wait)
                self.heartbeat.count("db_retries")
                if self._stop.wait(wait):
                    return None
                wait = min(DB_RETRY_MAX_S, wait * 2)
            except Exception as exc:
                return self._internal(item, exc)

    def _store(self, item: Inbound) -> Handled:
        from analysis.errors import SignalError
        from server.services.ingest import ingest_record

        fields = self.rule.match(item.topic)
        base = {"topic": item.topic}
        try:
            if fields is None:
                raise AppError(f"topic {item.topic!r} does not fit the rule {self.rule.template!r}",
                               field="topic")
            point_id, site_id = self._point(fields)
            base["point_id"] = point_id
            doc = decode(item.payload, max_bytes=self.settings.max_body_bytes)
            meta = doc.meta
            ref = meta.client_ref or derived_ref(point_id, meta.measured_at, doc.samples)
            base["client_ref"] = ref
            out = ingest_record(self.db, point_id=point_id, samples=doc.samples, fs_hz=meta.fs_hz,
                                units=meta.units, measured_at=meta.measured_at, speed_hz=meta.speed_hz,
                                speed_source=meta.speed_source, origin="mqtt",
                                uploader=f"mqtt:{item.topic}"[:120], client_ref=ref, limits=self.limits,
                                site_scope=site_id, tach_pulses_s=meta.tach_pulses_s,
                                tach_samples=meta.tach_samples, pulses_per_rev=meta.pulses_per_rev,
                                tach_level=meta.tach_level)
        except AppError as exc:
            return self._reject(base, exc.status, exc.code, exc.message, exc.field)
        except SignalError as exc:
            field = getattr(exc, "field", None)
            field = {"sample_rate_hz": "fs_hz"}.get(field, field)  # the API's name for it
            return self._reject(base, 422, "bad_signal", str(exc), field)
        status = "stored" if out.created else "duplicate"
        self.heartbeat.count("messages", outcome=status)
        reply = {"ok": True, **base, "record_id": out.record_id, "job_id": out.job_id,
                 "created": out.created}
        return Handled(True, reply, status)

    def _point(self, fields: dict[str, str]) -> tuple[int, int | None]:
        """``resolve_point`` with a short cache: a lookup costs a read per message otherwise. The
        ingestion service checks the point and its site again on every record, so a stale entry can
        never store into another site; a renamed point is seen after ``POINT_CACHE_S``."""
        key = tuple(sorted(fields.items()))
        hit = self._points.get(key)
        now = time.monotonic()
        if hit is not None and hit[0] > now:
            return hit[1]
        with self.db.read() as s:
            found = resolve_point(s, fields)
        if len(self._points) > 10_000:
            self._points.clear()
        self._points[key] = (now + POINT_CACHE_S, found)
        return found

    def _reject(self, base: dict, status: int, code: str, message: str, field: str | None) -> Handled:
        self.heartbeat.count("messages", outcome="rejected")
        self.heartbeat.count("rejects", code=code)
        log.info("rejected message on %s: %s", base["topic"], message)
        return Handled(False, {**error_body(status, code, message, field), **base}, "rejected")

    def _internal(self, item: Inbound, exc: Exception) -> Handled:
        ref = uuid.uuid4().hex[:12]
        log.error("unexpected error %s storing the message on %s", ref, item.topic, exc_info=exc)
        return self._reject({"topic": item.topic}, 500, "internal",
                            f"internal error (reference {ref}); nothing was stored, the bridge log has "
                            "the details; send the record again later", None)

    def _finish(self, item: Inbound, handled: Handled) -> None:
        fields = self.rule.match(item.topic)
        if not handled.stored or self.settings.mqtt_reply_accepted:
            topic = self.rule.reply_topic(self.settings.mqtt_reply_topic, item.topic, fields)
            if topic:
                self.client.publish(topic, json.dumps(handled.reply, separators=(",", ":")), qos=1)
        if item.qos >= 1:
            with self._gen_lock:  # an on_connect in between would make item.mid meaningless
                if item.generation == self.generation:
                    self.client.ack(item.mid, item.qos)

    def _work(self) -> None:
        while not self._stop.is_set():
            self.heartbeat.beat("connected" if self.subscribed.is_set() else "disconnected")
            try:
                item = self.inbox.get(timeout=0.2)
            except queue.Empty:
                continue
            handled = self.handle(item)
            if handled is None:  # stopping: leave it unacknowledged, the broker keeps it
                break
            self._finish(item, handled)

    # --- lifecycle --------------------------------------------------------------------------------
    def start(self) -> None:
        self.heartbeat.prune()
        self.heartbeat.beat("starting", force=True)
        self.client.connect_async(self.settings.mqtt_host, self.settings.mqtt_port,
                                  keepalive=self.settings.mqtt_keepalive_s)
        self.client.loop_start()
        self._thread = threading.Thread(target=self._work, name="halfwatch-mqtt-store", daemon=True)
        self._thread.start()

    def stop(self, timeout_s: float = 10.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout_s)
        self.client.disconnect()
        self.client.loop_stop()
        self.heartbeat.beat("stopped", force=True)

    def run(self, stop: threading.Event) -> None:
        self.start()
        try:
            while not stop.wait(0.5):
                if self._thread is not None and not self._thread.is_alive():
                    raise RuntimeError("the storing thread ended unexpectedly; see the log")
        finally:
            self.stop()


def _transient(exc) -> bool:
    """Database busy, locked, full or unreachable: worth waiting for."""
    from sqlalchemy.exc import OperationalError

    return bool(getattr(exc, "connection_invalidated", False)) or isinstance(exc, OperationalError)
