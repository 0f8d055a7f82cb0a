"""Ops-area helpers: child processes (``python -m server serve|worker``) and polling.

``Procs`` starts server and worker processes with the settings in their environment and kills
every process it started (by its own pid, never by name).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx
from support.servers import free_port

ROOT = Path(__file__).resolve().parents[2]

# Settings copied into a child process's environment (HALFWATCH_<NAME>).
PASSED = ("database_url", "data_dir", "secret_key", "argon2_time_cost", "argon2_memory_cost_kib",
          "argon2_parallelism", "worker_poll_s", "lease_s", "max_attempts", "retry_backoff_s",
          "max_inflight_ingests")


def child_env(settings, **extra) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("HALFWATCH_")}
    for name in PASSED:
        if hasattr(settings, name):
            env[f"HALFWATCH_{name.upper()}"] = str(getattr(settings, name))
    env.update({f"HALFWATCH_{k.upper()}": str(v) for k, v in extra.items()})
    env["PYTHONPATH"] = str(ROOT)
    env["PYTHONUNBUFFERED"] = "1"
    return env


class Procs:
    """Child processes of one test; everything still running at the end is killed by pid."""

    def __init__(self, tmp_path: Path):
        self.tmp_path = tmp_path
        self.started: list[subprocess.Popen] = []

    def _spawn(self, args: list[str], env: dict, name: str) -> subprocess.Popen:
        log = open(self.tmp_path / f"{name}-{len(self.started)}.log", "wb")  # noqa: SIM115 - kept open
        p = subprocess.Popen([sys.executable, "-m", "server", *args], env=env, cwd=ROOT, stdout=log,
                             stderr=subprocess.STDOUT)
        p.log_path = log.name
        log.close()
        self.started.append(p)
        return p

    def worker(self, settings, *extra_args, **env_extra) -> subprocess.Popen:
        return self._spawn(["worker", *extra_args], child_env(settings, **env_extra), "worker")

    def server(self, settings, *, port: int | None = None, timeout_s: float = 30.0, **env_extra):
        """Start ``serve`` on 127.0.0.1 and wait for /healthz; returns (process, base URL)."""
        port = port or free_port()
        p = self._spawn(["serve", "--host", "127.0.0.1", "--port", str(port)],
                        child_env(settings, **env_extra), "server")
        base = f"http://127.0.0.1:{port}"
        t0 = time.monotonic()
        while True:
            if p.poll() is not None:
                raise RuntimeError(f"server exited {p.returncode}: {self.output(p)[-2000:]}")
            try:
                if httpx.get(base + "/healthz", timeout=1.0).status_code == 200:
                    return p, base
            except httpx.TransportError:
                pass
            if time.monotonic() - t0 > timeout_s:
                raise RuntimeError("server did not answer /healthz: " + self.output(p)[-2000:])
            time.sleep(0.05)

    @staticmethod
    def output(p: subprocess.Popen) -> str:
        return Path(p.log_path).read_text(errors="replace")

    @staticmethod
    def kill(p: subprocess.Popen, sig: int = signal.SIGKILL) -> None:
        if p.poll() is None:
            p.send_signal(sig)
        try:
            p.wait(15)
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait(5)

    def close(self) -> None:
        for p in self.started:
            if p.poll() is None:
                self.kill(p)


def wait_for(predicate, *, timeout_s: float = 60.0, every_s: float = 0.05, what: str = "condition",
             detail=None):
    t0 = time.monotonic()
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() - t0 > timeout_s:
            extra = f"\n{detail()}" if detail is not None else ""
            raise AssertionError(f"timed out after {timeout_s:.0f} s waiting for {what}{extra}")
        time.sleep(every_s)
