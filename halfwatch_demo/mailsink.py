"""A local SMTP sink for trying halfwatch out: every message is written as an .eml file, nothing is relayed.

Used by ``halfwatch demo`` (on 127.0.0.1) and by the ``mail-sink`` service of docker-compose
(``halfwatch mail-sink``). Files are named ``<UTC time>-<n>.eml`` and open in any mail program.
"""

from __future__ import annotations

import datetime as dt
import email
import email.policy
import itertools
import os
import socket
import threading
from pathlib import Path


class EmlWriter:
    """aiosmtpd handler: accept any recipient, write the raw message (with envelope headers) to ``folder``."""

    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self._n = itertools.count(1)
        self._lock = threading.Lock()

    async def handle_DATA(self, server, session, envelope):
        stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%S")
        with self._lock:
            n = next(self._n)
        head = (f"X-Envelope-From: {envelope.mail_from}\r\n"
                f"X-Envelope-To: {', '.join(envelope.rcpt_tos)}\r\n").encode()
        path = self.folder / f"{stamp}-{os.getpid()}-{n:05d}.eml"
        tmp = path.with_suffix(".part")
        tmp.write_bytes(head + envelope.original_content)
        os.replace(tmp, path)  # readers never see a half-written message
        return "250 Message accepted for delivery"


def shown(path: Path) -> str:
    """A folder as people read it: relative to the working directory when it lies below it."""
    try:
        return str(Path(path).resolve().relative_to(Path.cwd().resolve())) or "."
    except ValueError:
        return str(path)


def free_port(host: str = "127.0.0.1") -> int:
    with socket.socket() as s:
        s.bind((host, 0))
        return s.getsockname()[1]


def start_sink(folder: Path, *, host: str = "127.0.0.1", port: int | None = None):
    """Start the sink in a background thread; returns the aiosmtpd Controller (``.stop()`` ends it)."""
    from aiosmtpd.controller import Controller

    ctl = Controller(EmlWriter(folder), hostname=host, port=port or free_port(host), ready_timeout=10)
    ctl.start()
    return ctl


def list_messages(folder: Path, limit: int = 200) -> list[dict]:
    """Newest first: file name, date, recipients and subject of each stored message."""
    out = []
    for path in sorted(Path(folder).glob("*.eml"), reverse=True)[:limit]:
        with path.open("rb") as fh:
            msg = email.message_from_binary_file(fh, policy=email.policy.default)
        out.append({"name": path.name, "date": msg.get("Date", ""), "to": msg.get("To", ""),
                    "subject": msg.get("Subject", "")})
    return out


def message_text(folder: Path, name: str) -> tuple[str, str] | None:
    """(subject, plain-text body) of one stored message, or None for an unknown name."""
    path = Path(folder) / name
    if "/" in name or not name.endswith(".eml") or not path.is_file():
        return None
    with path.open("rb") as fh:
        msg = email.message_from_binary_file(fh, policy=email.policy.default)
    body = msg.get_body(preferencelist=("plain",))
    return msg.get("Subject", ""), body.get_content() if body is not None else ""
