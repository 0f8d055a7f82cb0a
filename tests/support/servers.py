"""A real uvicorn server on 127.0.0.1 (in a thread, on a socket bound first: no port race)."""

from __future__ import annotations

import socket
import threading
import time
from contextlib import contextmanager


@contextmanager
def serve_in_thread(app, *, timeout_s: float = 20.0):
    import uvicorn

    sock = socket.socket()
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(app, log_level="warning", access_log=False, lifespan="on"))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    t0 = time.monotonic()
    try:
        while not server.started:
            if not thread.is_alive() or time.monotonic() - t0 > timeout_s:
                raise RuntimeError("uvicorn failed to start")
            time.sleep(0.02)
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout_s)
        sock.close()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class ServedPlant:
    """A seeded plant served by uvicorn: ``base`` URL, the ``app``, the ``plant`` ids and the seeding time."""

    def __init__(self, base, app, plant, now):
        self.base, self.app, self.plant, self.now = base, app, plant, now

    @property
    def db(self):
        return self.app.state.db


@contextmanager
def served_plant(tmp, seed, **settings_kw):
    """Migrate a database in ``tmp``, build the test plant, call ``seed(db, plant, now)``, analyse every
    reading with the real worker, add one user per role (password ``support.fixtures.PASSWORD``) and serve
    the app with its embedded worker; yields a :class:`ServedPlant`."""
    import datetime as dt

    from server.app import create_app
    from server.migrations import upgrade
    from server.services.users import add_user
    from server.storage import Database
    from server.worker import run_once
    from support.fixtures import PASSWORD, ROLES, settings_for
    from support.plant import make_plant

    settings = settings_for(tmp, embedded_worker=True, **settings_kw)
    upgrade(settings.database_url)
    db = Database(settings.database_url)
    plant = make_plant(db)
    now = dt.datetime.now(dt.UTC)
    seed(db, plant, now)
    while run_once(db, settings):
        pass
    db.dispose()
    app = create_app(settings)
    for role in ROLES:
        add_user(app.state.db, settings, username=f"{role}1", password=PASSWORD, role=role,
                 email=f"{role}1@example.test", hashing=app.state.passwords)
    with serve_in_thread(app) as base:
        yield ServedPlant(base, app, plant, now)
