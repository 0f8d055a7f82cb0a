"""Re-run the access probe's figures against real `halfwatch serve` processes on 127.0.0.1 and print a table.

Sections (each bounded; everything on loopback, in a temporary directory or a fresh PostgreSQL schema):

1. access table: every route of the app called without credentials and with a viewer key; counts of
   refusals, and any non-public route that answered 2xx without credentials (should be none);
2. kill -9 mid-burst: sensors send records; the server is killed with SIGKILL part-way; after a restart
   every record that was acknowledged (201) must be there;
3. concurrent logins: 30 wrong passwords at once on one user name, Argon2 at production cost (64 MiB):
   answers by status and the rise of the server's peak RSS (VmHWM, /proc/<pid>/status);
4. pre-auth body: a 60 MiB body with a wrong key: time to the 401, bytes the client got to send, peak RSS;
5. route upload: a 64 MiB ZIP with a valid key: peak RSS rise against the upload's size (spooled to disk).

    .venv/bin/python bench/probe.py [--pg-url postgresql+psycopg://...] [--skip kill9,login]

Memory figures are peak-resident-set rises of the server process, so they include Python's own arenas;
read them as bounds, not exact costs.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import zipfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx
import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
from benchdb import fresh_database, migrated_plant  # noqa: E402

FS = 2560.0
ROWS: list[tuple[str, str, str]] = []  # (section, measure, value)


def row(section: str, measure: str, value) -> None:
    ROWS.append((section, measure, str(value)))
    print(f"  {section:<16} {measure:<58} {value}", flush=True)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def status_mib(pid: int, field: str) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) / 1024
    return float("nan")


class Server:
    def __init__(self, env: dict, tmp: Path):
        self.env, self.tmp, self.proc, self.port = env, tmp, None, free_port()
        self.base = f"http://127.0.0.1:{self.port}"

    def start(self) -> Server:
        log = open(self.tmp / f"server-{self.port}.log", "ab")  # noqa: SIM115 - closed with the process
        self.proc = subprocess.Popen([sys.executable, "-m", "server", "serve", "--host", "127.0.0.1",
                                      "--port", str(self.port)], env=self.env, cwd=REPO, stdout=log,
                                     stderr=subprocess.STDOUT)
        log.close()
        t0 = time.monotonic()
        while time.monotonic() - t0 < 120:
            if self.proc.poll() is not None:
                raise RuntimeError((self.tmp / f"server-{self.port}.log").read_text()[-2000:])
            try:
                if httpx.get(self.base + "/healthz", timeout=1).status_code == 200:
                    return self
            except httpx.TransportError:
                pass
            time.sleep(0.1)
        raise RuntimeError("server did not start")

    def stop(self, sig=signal.SIGTERM) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(20)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)


def access_table(srv: Server, viewer_key: str) -> None:
    from server.app import create_app  # the route list only; no requests go through this instance
    from server.settings import Settings

    app = create_app(Settings(database_url=srv.env["HALFWATCH_DATABASE_URL"]))
    def walk(routes):  # included routers keep their routes in original_router (newer FastAPI)
        for r in routes:
            if hasattr(r, "original_router"):
                prefix = getattr(getattr(r, "include_context", None), "prefix", "") or ""
                yield from ((m, prefix + p) for m, p in walk(r.original_router.routes))
            elif getattr(r, "methods", None):
                yield from ((m, r.path) for m in r.methods if m != "HEAD")

    routes = sorted(set(walk(app.routes)))
    app.state.db.dispose()
    public_ok = {"/healthz", "/readyz", "/metrics", "/openapi.json", "/docs", "/docs/oauth2-redirect",
                 "/redoc", "/login", "/api/v1/session", "/static/plotly.min.js", "/static/{name:path}"}
    open_2xx, viewer_2xx, anon_refused, viewer_refused = [], [], 0, 0
    with httpx.Client(base_url=srv.base, timeout=30, follow_redirects=False) as c:
        for method, path in routes:
            url = path.replace("{name:path}", "style.css")
            for part in [p for p in url.split("/") if p.startswith("{")]:
                url = url.replace(part, "1")
            r = c.request(method, url)
            if r.status_code in (401, 403) or (r.status_code in (302, 303, 307) and "/login" in
                                               r.headers.get("location", "")):
                anon_refused += 1
            elif 200 <= r.status_code < 300 and path not in public_ok:
                open_2xx.append(f"{method} {path}")
            if method != "GET" and path not in public_ok:
                rv = c.request(method, url, headers={"X-API-Key": viewer_key})
                viewer_refused += rv.status_code == 403
                if 200 <= rv.status_code < 300:
                    viewer_2xx.append(f"{method} {path}")
    row("access", "routes (method, path)", len(routes))
    row("access", "refused without credentials (401/403/redirect to login)", anon_refused)
    row("access", "writes refused for a viewer key (403)", viewer_refused)
    row("access", "non-public routes answering 2xx without credentials", ", ".join(open_2xx) or "none")
    row("access", "writes a viewer key got a 2xx for", ", ".join(viewer_2xx) or "none")


def kill9(env: dict, tmp: Path, key: str, point_id: int, db) -> None:
    from sqlalchemy import select

    from server.storage.tables import Record

    srv = Server(env, tmp).start()
    t = np.arange(8192) / FS
    body = (np.sin(2 * np.pi * 24.75 * t)).astype("<f4").tobytes()
    acked, lock, stop = [], threading.Lock(), threading.Event()

    def sensor(n: int) -> None:
        i = 0
        with httpx.Client(timeout=10) as c:
            while not stop.is_set():
                i += 1
                try:
                    r = c.post(f"{srv.base}/api/v1/points/{point_id}/records", content=body,
                               params={"fs_hz": FS, "units": "m/s2", "measured_at": "2026-11-02T08:00:00Z",
                                       "client_ref": f"probe-{n}-{i}"},
                               headers={"X-API-Key": key, "Content-Type": "application/octet-stream"})
                except httpx.TransportError:
                    continue
                if r.status_code == 201:
                    with lock:
                        acked.append(r.json()["record_id"])

    threads = [threading.Thread(target=sensor, args=(n,)) for n in range(8)]
    for th in threads:
        th.start()
    while len(acked) < 150:
        time.sleep(0.01)
    srv.stop(signal.SIGKILL)
    stop.set()
    for th in threads:
        th.join(30)
    srv2 = Server(env, tmp).start()  # restart on the same database
    with db.read() as s:
        present = set(s.scalars(select(Record.id).where(Record.id.in_(acked))))
    srv2.stop()
    row("kill -9", "records acknowledged (201) before SIGKILL", len(acked))
    row("kill -9", "of them present after the restart", len(present))
    row("kill -9", "acknowledged but missing", len(set(acked) - present))


def logins(env: dict, tmp: Path, db, settings) -> None:
    from server.services.users import add_user

    add_user(db, settings, username="probe7", password="a long enough secret", role="viewer")
    srv = Server(env, tmp).start()
    peak0 = status_mib(srv.proc.pid, "VmHWM")
    rss0 = status_mib(srv.proc.pid, "VmRSS")

    def attempt(i: int) -> int:
        return httpx.post(srv.base + "/api/v1/session", json={"username": "probe7", "password": f"no {i}"},
                          timeout=120).status_code

    t0 = time.monotonic()
    with ThreadPoolExecutor(30) as pool:
        codes = list(pool.map(attempt, range(30)))
    took = time.monotonic() - t0
    counts = {c: codes.count(c) for c in sorted(set(codes))}
    row("logins x30", "answers by status", json.dumps(counts))
    row("logins x30", "wall time of the burst, s", f"{took:.2f}")
    row("logins x30", "server RSS before, MiB", f"{rss0:.0f}")
    row("logins x30", "peak RSS rise (VmHWM), MiB", f"{status_mib(srv.proc.pid, 'VmHWM') - peak0:.0f}")
    row("logins x30", "bound: login_hash_slots x argon2 memory, MiB",
        f"{settings.login_hash_slots * settings.argon2_memory_cost_kib / 1024:.0f}")
    srv.stop()


def preauth(env: dict, tmp: Path, point_id: int) -> None:
    srv = Server(env, tmp).start()
    peak0 = status_mib(srv.proc.pid, "VmHWM")
    total = 60 * 1024 * 1024
    sock = socket.create_connection(("127.0.0.1", srv.port), timeout=60)
    head = (f"POST /api/v1/points/{point_id}/records HTTP/1.1\r\nHost: 127.0.0.1\r\n"
            f"Content-Length: {total}\r\nContent-Type: application/json\r\n"
            "X-API-Key: hwk_0badc0de_wrong\r\n\r\n").encode()
    sent, done = [0], threading.Event()

    def pump():
        chunk = b"0," * (1 << 19)
        try:
            sock.sendall(head)
            while sent[0] < total and not done.is_set():
                piece = chunk[: total - sent[0]]
                sock.sendall(piece)
                sent[0] += len(piece)
        except OSError:
            pass

    t0 = time.monotonic()
    th = threading.Thread(target=pump, daemon=True)
    th.start()
    data = b""
    while b"\r\n\r\n" not in data:
        piece = sock.recv(65536)
        if not piece:
            break
        data += piece
    took, at = time.monotonic() - t0, sent[0]
    done.set()
    sock.close()
    th.join(10)
    row("pre-auth body", "answer to a 60 MiB body with a wrong key", data.split(b"\r\n", 1)[0].decode())
    row("pre-auth body", "time to the answer, s", f"{took:.3f}")
    row("pre-auth body", "body bytes the client had sent by then, MiB", f"{at / 2**20:.1f}")
    row("pre-auth body", "peak RSS rise (VmHWM), MiB", f"{status_mib(srv.proc.pid, 'VmHWM') - peak0:.0f}")
    srv.stop()


def upload(env: dict, tmp: Path, key: str, route_id: int) -> None:
    srv = Server(env, tmp).start()
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_STORED) as zf:
        zf.writestr("manifest.csv", "point,measured_at,file,fs_hz,units\n"
                                    "DE-H,2026-11-02T08:00:00Z,a.csv,2560,m/s2\n")
        zf.writestr("a.csv", "\n".join(f"{v:.5f}" for v in np.sin(np.arange(16384) * 0.06)) + "\n")
        zf.writestr("attachments/photo.bin", np.random.default_rng(1).bytes(64 * 1024 * 1024))
    data = buf.getvalue()
    peak0 = status_mib(srv.proc.pid, "VmHWM")
    r = httpx.post(f"{srv.base}/api/v1/routes/{route_id}/uploads", content=data, timeout=300,
                   headers={"X-API-Key": key, "Content-Type": "application/zip"})
    row("route upload", "upload size, MiB", f"{len(data) / 2**20:.0f}")
    rows = r.json().get("rows") or [{}]
    row("route upload", "answer", f"{r.status_code} accepted={r.json().get('accepted')} "
        f"{(rows[0].get('error') or {}).get('message', '')[:60]}")
    row("route upload", "peak RSS rise (VmHWM), MiB", f"{status_mib(srv.proc.pid, 'VmHWM') - peak0:.0f}")
    srv.stop()


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    p.add_argument("--pg-url", default=None, help="PostgreSQL URL (default: a SQLite file)")
    p.add_argument("--skip", default="", help="comma-separated: access,kill9,login,preauth,upload")
    args = p.parse_args()
    skip = set(filter(None, args.skip.split(",")))
    with tempfile.TemporaryDirectory(prefix="hw-probe-") as tmpdir:
        tmp = Path(tmpdir)
        url, cleanup = fresh_database(tmp, args.pg_url)
        try:
            from server.services.users import create_api_key
            from server.settings import Settings
            from server.storage.tables import Route, RouteStop

            db, points = migrated_plant(url)
            with db.unit_of_work() as s:
                route = Route(site_id=1, name="Probe walk")
                s.add(route)
                s.flush()
                s.add(RouteStop(route_id=route.id, point_id=points[0], position=0, due_interval_h=24.0))
                route_id = route.id
            key = create_api_key(db, name="probe sensors", role="technician")[0]
            viewer = create_api_key(db, name="probe viewer", role="viewer")[0]
            secret = os.urandom(16).hex()
            env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
            env.update(HALFWATCH_DATABASE_URL=url, HALFWATCH_DATA_DIR=str(tmp), PYTHONPATH=str(REPO),
                       HALFWATCH_SECRET_KEY=secret)
            settings = Settings(database_url=url, secret_key=secret)  # production Argon2 cost
            print(f"probe on {'PostgreSQL' if args.pg_url else 'SQLite'}, {os.cpu_count()} cores, load "
                  f"{os.getloadavg()[0]:.1f}", flush=True)
            if "access" not in skip:
                srv = Server(env, tmp).start()
                try:
                    access_table(srv, viewer)
                finally:
                    srv.stop()
            if "kill9" not in skip:
                kill9(env, tmp, key, points[0], db)
            if "login" not in skip:
                logins(env, tmp, db, settings)
            if "preauth" not in skip:
                preauth(env, tmp, points[0])
            if "upload" not in skip:
                upload(env, tmp, key, route_id)
            db.dispose()
        finally:
            cleanup()
    print()
    print(f"| {'section':<16} | {'measure':<58} | value")
    print(f"|{'-' * 18}|{'-' * 60}|{'-' * 20}")
    for section, measure, value in ROWS:
        print(f"| {section:<16} | {measure:<58} | {value}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
