"""Real `stockrelay serve` and `stockrelay worker` processes on loopback, for end-to-end tests.

Every process is started through a `Live` pool, which the `live` fixture (conftest.py) stops
when the test ends, whatever happened: SIGTERM, a grace period, then SIGKILL. Output goes to
files, so a chatty process can never block on a full pipe.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import httpx2
import pytest

from service.auth import create_key
from service.db.keys import get_or_create_tenant
from service.db.migrate import upgrade
from service.db.session import make_engine, make_session_factory

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "service" / "data" / "demo_network.json"

# Start-up (imports, engine, migration check) takes about 2 s on the 2-core test machine.
START_DEADLINE = 30.0
SOLVE_DEADLINE = 60.0
STOP_DEADLINE = 15.0

T = TypeVar("T")


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        port: int = probe.getsockname()[1]
        return port


def migrate(url: str) -> None:
    engine = make_engine(url)
    try:
        upgrade(engine)
    finally:
        engine.dispose()


def api_key(url: str, tenant: str = "default") -> str:
    """A new write key of `tenant` in the database at `url`."""
    engine = make_engine(url)
    try:
        with make_session_factory(engine).begin() as session:
            return create_key(session, get_or_create_tenant(session, tenant), "write")[1]
    finally:
        engine.dispose()


def demo_document() -> dict[str, Any]:
    document: dict[str, Any] = json.loads(DEMO.read_text())
    return document


def environment(url: str, **settings: str | float | int) -> dict[str, str]:
    """This process's environment without its STOCKRELAY_* variables, plus `settings`."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("STOCKRELAY_")}
    env.update({f"STOCKRELAY_{k.upper()}": str(v) for k, v in settings.items()})
    env["STOCKRELAY_DATABASE_URL"] = url
    env["OPENBLAS_NUM_THREADS"] = "1"  # two cores: several BLAS pools would oversubscribe them
    return env


@dataclass
class Process:
    name: str
    process: subprocess.Popen[bytes]
    log: Path

    def output(self) -> str:
        return self.log.read_text(errors="replace")


@dataclass
class Live:
    tmp_path: Path
    started: list[Process] = field(default_factory=list)

    def start(self, name: str, argv: list[str], env: dict[str, str], cwd: Path = ROOT) -> Process:
        log = self.tmp_path / f"{name}-{len(self.started)}.log"
        with log.open("wb") as sink:
            process = subprocess.Popen(
                argv, cwd=cwd, env=env, stdin=subprocess.DEVNULL, stdout=sink, stderr=sink
            )
        started = Process(name, process, log)
        self.started.append(started)
        return started

    def stockrelay(self, name: str, args: list[str], url: str, **settings: Any) -> Process:
        return self.start(
            name, [sys.executable, "-m", "service.cli", *args], environment(url, **settings)
        )

    def api(self, url: str) -> str:
        """Start `stockrelay serve` on a free loopback port; its base URL once /readyz is 200."""
        return self.serve(environment(url))[0]

    def serve(self, env: dict[str, Any], workers: int = 1) -> tuple[str, Process]:
        """`stockrelay serve --processes N` with `env` on a free loopback port: its base URL once
        /readyz is 200, and the process."""
        port = free_port()
        argv = ["serve", "--host", "127.0.0.1", "--port", str(port), "--processes", str(workers)]
        server = self.start("api", [sys.executable, "-m", "service.cli", *argv], env)
        base = f"http://127.0.0.1:{port}"

        def ready() -> bool:
            try:
                return httpx2.get(base + "/readyz", timeout=2).status_code == 200
            except httpx2.TransportError:
                return False

        self.wait_for(ready, deadline=START_DEADLINE, what=f"the API ({server.log.name})")
        return base, server

    def worker(self, url: str) -> Process:
        return self.stockrelay("worker", ["worker"], url, poll_interval=0.1)

    def check_alive(self) -> None:
        for started in self.started:
            code = started.process.poll()
            if code is not None:
                pytest.fail(f"{started.name} exited with {code}:\n{started.output()}")

    def wait_for(self, probe: Callable[[], T | None], *, deadline: float, what: str) -> T:
        """Poll `probe` every 50 ms until it returns something other than None or False."""
        give_up = time.monotonic() + deadline
        while True:
            value = probe()
            if value is not None and value is not False:
                return value
            self.check_alive()
            if time.monotonic() > give_up:
                logs = "\n".join(f"--- {p.name}\n{p.output()}" for p in self.started)
                pytest.fail(f"gave up after {deadline} s waiting for {what}\n{logs}")
            time.sleep(0.05)

    def stop_all(self) -> None:
        for started in self.started:
            if started.process.poll() is None:
                started.process.send_signal(signal.SIGTERM)
        for started in self.started:
            try:
                started.process.wait(timeout=STOP_DEADLINE)
            except subprocess.TimeoutExpired:
                started.process.kill()
                started.process.wait(timeout=STOP_DEADLINE)


def wait_until_solved(
    live: Live, client: httpx2.Client, network_id: int, criteria: list[str]
) -> None:
    """Poll GET /v1/networks/{id} until every criterion's policy is ready."""

    def solved() -> bool:
        response = client.get(f"/v1/networks/{network_id}")
        assert response.status_code == 200, response.text
        states = {s["criterion"]: s for s in response.json()["solves"]}
        failed = [s for c, s in states.items() if c in criteria and s["state"] == "failed"]
        assert not failed, failed
        return all(states[c]["state"] == "ready" for c in criteria)

    live.wait_for(solved, deadline=SOLVE_DEADLINE, what=f"network {network_id} to be solved")
