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
