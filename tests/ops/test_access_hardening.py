"""Unauthenticated load cannot buy memory: a concurrent login burst and a large body with a wrong key,
against real `halfwatch serve` processes on 127.0.0.1, on SQLite and PostgreSQL.

Memory is read from the kernel: ``VmHWM`` (the peak resident set) and ``VmRSS`` in /proc/<pid>/status
(proc(5), Linux man-pages). Argon2id needs its ``memory_cost`` in KiB for every hash being computed
(RFC 9106 section 3.1), so N hashes at once need about N x memory_cost; the bounds below are stated
from that, plus a margin for the interpreter (house choice).
"""

from __future__ import annotations

import json
import socket
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx
import pytest

ARGON2_KIB = 32 * 1024  # 32 MiB per hash in these tests (production default: 64 MiB)
SLOTS = 4  # login_hash_slots default
MARGIN_MIB = 64  # interpreter, sockets, database driver (house choice)


def _status_mib(pid: int, field: str) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) / 1024  # the kernel reports kB
    raise AssertionError(f"{field} not in /proc/{pid}/status")


def _hashing_settings(settings):
    return settings.model_copy(update=dict(argon2_memory_cost_kib=ARGON2_KIB, argon2_time_cost=1,
                                           argon2_parallelism=1))


def test_concurrent_wrong_passwords_are_throttled_across_processes_and_memory_stays_bounded(backend, procs):
    from server.services.users import add_user

    db, settings, _plant = backend
    settings = _hashing_settings(settings)
    add_user(db, settings, username="planner7", password="a long enough secret", role="viewer")
    servers = [procs.server(settings) for _ in range(2)]  # two API processes on one database
    base_peak = {p.pid: _status_mib(p.pid, "VmHWM") for p, _ in servers}

    def attempt(i: int) -> int:
        base = servers[i % 2][1]
        r = httpx.post(base + "/api/v1/session", json={"username": "planner7", "password": f"wrong {i}"},
                       timeout=60)
        if r.status_code in (429, 503):
            assert int(r.headers["Retry-After"]) >= 1
        return r.status_code

    with ThreadPoolExecutor(30) as pool:
        codes = list(pool.map(attempt, range(30)))
    limit = settings.login_max_failures
    assert set(codes) <= {401, 429, 503}, codes
    # the counts are shared: both processes together check at most `limit` wrong passwords
    assert codes.count(401) <= limit, codes
    assert codes.count(429) >= 30 - limit - SLOTS, codes
    # one at a time, alternating processes: exactly `limit` wrong passwords in all are checked (an attempt
    # refused with 503 never reached the hash and is not counted), then 429 in both processes
    checked = codes.count(401)
    for i in range(2 * limit):
        code = attempt(i)
        if code == 429:
            break
        assert code == 401
        checked += 1
    assert checked == limit, codes
    assert attempt(1) == 429
    # and once the limit is used up, even the right password waits for the window
    r = httpx.post(servers[0][1] + "/api/v1/session", json={"username": "planner7",
                                                             "password": "a long enough secret"})
    assert r.status_code == 429, r.text
    bound = SLOTS * ARGON2_KIB / 1024 + MARGIN_MIB
    for p, _ in servers:
        rise = _status_mib(p.pid, "VmHWM") - base_peak[p.pid]
        assert rise < bound, f"peak RSS of pid {p.pid} rose {rise:.0f} MiB (bound {bound:.0f} MiB)"
        assert _status_mib(p.pid, "VmRSS") < base_peak[p.pid] + bound


def _send_while_reading(base: str, path: str, headers: dict, total: int) -> tuple[int, int, dict]:
    """POST ``total`` bytes of body over a raw socket, reading the answer at the same time.
    Returns (status, bytes of body sent when the answer came, answer JSON)."""
    host, port = base.removeprefix("http://").split(":")
    sock = socket.create_connection((host, int(port)), timeout=30)
    head = f"POST {path} HTTP/1.1\r\nHost: {host}\r\nContent-Length: {total}\r\n" + "".join(
        f"{k}: {v}\r\n" for k, v in headers.items()) + "\r\n"
    sent = [0]
    done = threading.Event()

    def pump():
        chunk = b"[" + b"0," * (1 << 19)  # a JSON-looking body
        try:
            sock.sendall(head.encode())
            while sent[0] < total and not done.is_set():
                piece = chunk[: total - sent[0]]
                sock.sendall(piece)
                sent[0] += len(piece)
        except OSError:  # the server closed the connection after answering: expected
            pass

    t = threading.Thread(target=pump, daemon=True)
    t.start()
    data = b""
    try:
        while b"\r\n\r\n" not in data:
            piece = sock.recv(65536)
            if not piece:
                break
            data += piece
        at_answer = sent[0]
        head_part, _, rest = data.partition(b"\r\n\r\n")
        length = int(next(line.split(b":")[1] for line in head_part.split(b"\r\n")
                          if line.lower().startswith(b"content-length")))
        while len(rest) < length:
            rest += sock.recv(65536)
    finally:
        done.set()
        sock.close()
        t.join(10)
    status = int(head_part.split(b" ")[1])
    return status, at_answer, json.loads(rest[:length])


@pytest.mark.parametrize("key", ["hwk_0badc0de_not-a-real-key", None])
def test_a_large_body_with_a_wrong_key_is_refused_before_it_is_read(backend, procs, key):
    db, settings, plant = backend
    proc, base = procs.server(settings)
    peak0 = _status_mib(proc.pid, "VmHWM")
    total = 60 * 1024 * 1024  # below max_body_bytes (64 MiB): only the key is wrong
    headers = {"Content-Type": "application/json"}
    if key:
        headers["X-API-Key"] = key
    t0 = time.monotonic()
    status, at_answer, body = _send_while_reading(base, f"/api/v1/points/{plant.point_id}/records", headers,
                                                  total)
    elapsed = time.monotonic() - t0
    assert status == 401 and body["error"]["code"] == "unauthorized", body
    # answered from the headers: the client was still sending (socket buffers hold a few MiB at most)
    assert at_answer < total // 2, (at_answer, elapsed)
    rise = _status_mib(proc.pid, "VmHWM") - peak0
    assert rise < 32, f"peak RSS rose {rise:.0f} MiB for a refused body"  # house bound: well below the body


def test_a_content_length_above_the_limit_is_refused_before_reading(backend, procs, api_key_for):
    db, settings, plant = backend
    proc, base = procs.server(settings)
    too_big = settings.max_body_bytes + 1
    status, at_answer, body = _send_while_reading(
        base, f"/api/v1/points/{plant.point_id}/records", {"Content-Type": "application/octet-stream",
                                                            "X-API-Key": api_key_for(db, plant)}, too_big)
    assert status == 413 and body["error"]["field"] == "body", body
    assert at_answer < too_big // 2


@pytest.fixture
def api_key_for():
    def make(db, plant):
        from server.services.users import create_api_key

        return create_api_key(db, name="gw", role="technician", site=plant.site_id)[0]

    return make


def test_a_large_route_upload_is_spooled_not_held_in_memory(backend, procs, api_key_for):
    """A 48 MiB route ZIP (a 47 MiB attachment beside one small reading) with a valid key: the server's
    peak RSS rises by well under the upload's size (house bound: a third of it)."""
    import io
    import zipfile

    import numpy as np

    db, settings, plant = backend
    proc, base = procs.server(settings)
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_STORED) as zf:
        zf.writestr("manifest.csv", "point,measured_at,file,fs_hz,units\n"
                                    "P1-DE-H,2026-11-02T08:00:00Z,a.csv,2560,m/s2\n")
        zf.writestr("a.csv", "\n".join(f"{v:.5f}" for v in np.sin(np.arange(8192) * 0.06)) + "\n")
        zf.writestr("photos/pump.bin", np.random.default_rng(7).bytes(47 * 1024 * 1024))
    data = buf.getvalue()
    peak0 = _status_mib(proc.pid, "VmHWM")
    r = httpx.post(f"{base}/api/v1/routes/{plant.route_id}/uploads", content=data, timeout=120,
                   headers={"X-API-Key": api_key_for(db, plant), "Content-Type": "application/zip"})
    assert r.status_code == 201 and r.json()["accepted"] == 1, r.text
    rise = _status_mib(proc.pid, "VmHWM") - peak0
    size = len(data) / 2**20
    assert rise < size / 3, f"peak RSS rose {rise:.0f} MiB for a {size:.0f} MiB upload"


def test_a_full_set_of_hash_slots_answers_503_and_does_not_count(tmp_path, migrated_template):
    from fastapi.testclient import TestClient
    from support.fixtures import migrate, settings_for

    from server.app import create_app
    from server.services.users import add_user

    settings = settings_for(tmp_path, login_hash_slots=1)
    migrate(settings, migrated_template)
    app = create_app(settings)
    add_user(app.state.db, settings, username="planner5", password="a long enough secret", role="viewer",
             hashing=app.state.passwords)
    app.state.hash_slots.wait_s = 0.2
    with TestClient(app) as c:
        app.state.hash_slots.acquire()  # another login is being checked
        try:
            for _ in range(settings.login_max_failures + 2):
                r = c.post("/api/v1/session", json={"username": "planner5", "password": "wrong"})
                assert r.status_code == 503 and int(r.headers["Retry-After"]) >= 1, r.text
        finally:
            app.state.hash_slots.release()
        # none of those were counted: the full allowance of failures is still there, then 429
        for _ in range(settings.login_max_failures):
            assert c.post("/api/v1/session", json={"username": "planner5", "password": "wrong"}
                          ).status_code == 401
        assert c.post("/api/v1/session", json={"username": "planner5", "password": "wrong"}
                      ).status_code == 429
