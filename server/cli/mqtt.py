"""``halfwatch mqtt-bridge``: store records that sensor gateways publish to an MQTT broker."""

from __future__ import annotations

import argparse

from server.cli import UsageError

_OPTIONS = {  # command-line option -> settings field (the environment sets the same fields)
    "host": "mqtt_host",
    "port": "mqtt_port",
    "client_id": "mqtt_client_id",
    "topic": "mqtt_topic",
    "reply_topic": "mqtt_reply_topic",
    "username": "mqtt_username",
    "ca_file": "mqtt_ca_file",
    "cert_file": "mqtt_cert_file",
    "key_file": "mqtt_key_file",
}


def _settings(args):
    from pydantic import ValidationError

    from server.settings import Settings

    overrides = {field: getattr(args, opt) for opt, field in _OPTIONS.items()
                 if getattr(args, opt) is not None}
    if args.password_file is not None:
        try:
            with open(args.password_file, encoding="utf-8") as fh:
                overrides["mqtt_password"] = fh.readline().rstrip("\r\n")
        except OSError as exc:
            raise UsageError(f"--password-file: {exc.strerror}: {args.password_file}") from None
    for flag, field in (("tls", "mqtt_tls"), ("tls_insecure", "mqtt_tls_insecure")):
        if getattr(args, flag):
            overrides[field] = True
    if args.no_accept_replies:
        overrides["mqtt_reply_accepted"] = False
    try:
        return Settings(**overrides)
    except ValidationError as exc:
        first = exc.errors()[0]
        raise UsageError(f"{'.'.join(map(str, first['loc']))}: {first['msg']}") from None


def cmd_mqtt_bridge(args) -> int:
    import logging
    import signal
    import threading

    from server.mqtt.bridge import Bridge
    from server.mqtt.topics import RuleError
    from server.storage import Database, SchemaNotReady

    settings = _settings(args)
    db = Database.from_settings(settings)
    try:
        db.check_schema()
    except SchemaNotReady as exc:
        db.dispose()
        raise UsageError(str(exc)) from None
    try:
        bridge = Bridge(db, settings)
    except (RuleError, OSError, ValueError) as exc:
        db.dispose()
        raise UsageError(str(exc)) from None
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    stop = threading.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, lambda *_: stop.set())
    print(f"halfwatch mqtt-bridge: {settings.mqtt_host}:{settings.mqtt_port}, subscribing to "
          f"{bridge.rule.filter} as {settings.mqtt_client_id}; replies on {settings.mqtt_reply_topic}",
          flush=True)
    try:
        bridge.run(stop)
    finally:
        db.dispose()
    return 0


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("mqtt-bridge", help="store records published by sensor gateways to an MQTT broker",
                       description="Subscribe to the topic rule on the broker and store each record through "
                       "the ingestion service (QoS 1, persistent session, acknowledged after commit). "
                       "Every option can also be set by HALFWATCH_MQTT_* environment variables.")
    p.add_argument("--host", default=None, help="broker host (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=None, help="broker port (default 1883; 8883 is usual for TLS)")
    p.add_argument("--client-id", default=None, help="stable client id; the broker keeps its session")
    p.add_argument("--topic", default=None, help="topic rule, e.g. 'halfwatch/{site}/{point_id}/records'")
    p.add_argument("--reply-topic", default=None, help="reply template, e.g. '{topic}/reply'")
    p.add_argument("--no-accept-replies", action="store_true", help="publish replies for rejects only")
    p.add_argument("--username", default=None, help="broker user name, if the broker needs one")
    p.add_argument("--password-file", default=None, help="file whose first line is the broker password")
    p.add_argument("--tls", action="store_true", help="connect with TLS")
    p.add_argument("--ca-file", default=None, help="CA bundle for the broker certificate")
    p.add_argument("--cert-file", default=None, help="client certificate (TLS client authentication)")
    p.add_argument("--key-file", default=None, help="client key")
    p.add_argument("--tls-insecure", action="store_true", help="skip the broker host name check")
    p.set_defaults(func=cmd_mqtt_bridge)
