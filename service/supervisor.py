"""`stockrelay run`: the HTTP API and solve workers together, for a laptop or a demo.

The API (`stockrelay serve`) and each worker (`stockrelay worker`) run as child processes. Once
the API answers and the demo network's policy is ready, an example request is printed. Ctrl-C
(SIGINT), SIGTERM or SIGHUP stops everything: SIGTERM to each child, SIGKILL to any child still
running after the grace period. If a child exits by itself, the others are stopped too.

The API child gets a random token for this run (STOCKRELAY_RUN_TOKEN) and /readyz echoes it, so
an answer from another server that already holds the port is never taken for ours; the port is
also tried before anything starts (`port_problem`).

The children stay in the caller's process group, so a Ctrl-C typed at the terminal also reaches
them directly (`make run` relies on that, and a killed supervisor cannot leave them deaf to
it); a stop signal arriving twice is harmless to both uvicorn and the worker.
"""

from __future__ import annotations

import json
import os
import secrets
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable
from dataclasses import dataclass
from types import FrameType
from typing import Any

from service.api.health import RUN_HEADER
from service.demo import DEMO_NETWORK, DEMO_STOCK
from service.vocabulary import SolveStatus

__all__ = ["port_problem", "ready_answer", "supervise"]

# The worker may need up to 10 s to finish or hand back a solve, and a write it started may wait
# up to SQLite's 30 s busy timeout for another process's; uvicorn needs a moment to drain. A
# child that exits at once is not held up by this.
STOP_GRACE_SECONDS = 45.0
# Start-up (imports, engine, migration check) takes about 2 s on a 2-core machine.
READY_DEADLINE_SECONDS = 60.0
SOLVE_DEADLINE_SECONDS = 60.0
_POLL_SECONDS = 0.1
_STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)
# The probes go straight to our own children, whatever proxy the environment names.
_DIRECT = urllib.request.build_opener(urllib.request.ProxyHandler({}))


@dataclass
class Child:
    name: str
    process: subprocess.Popen[bytes]

    def exited(self) -> int | None:
        return self.process.poll()


def supervise(host: str, port: int, n_workers: int, key: str) -> int:
    """Run the API on host:port and `n_workers` solve workers until a stop signal.

    Returns 0 after a requested stop in which every child stopped within the grace period,
    1 when a child exited by itself or had to be killed."""
    stop = threading.Event()

    def request_stop(signum: int, _frame: FrameType | None) -> None:
        stop.set()

    previous = {sig: signal.signal(sig, request_stop) for sig in _STOP_SIGNALS}
    children: list[Child] = []
    token = secrets.token_urlsafe(16)
    try:
        command = [sys.executable, "-m", "service.cli"]
        api = [*command, "serve", "--host", host, "--port", str(port)]
        children.append(_start("API", api, {"STOCKRELAY_RUN_TOKEN": token}))
        children.extend(_start(f"worker {n + 1}", [*command, "worker"]) for n in range(n_workers))
        base = f"http://{_probe_host(host)}:{port}"
        answer: str | None = None

        def answered() -> bool:
            nonlocal answer
            answer = ready_answer(base, token)
            return answer is not None

        if _wait(answered, stop, children, READY_DEADLINE_SECONDS):
            if answer == "ours":
                _announce(base, n_workers, stop, children, key)
            else:
                sys.stderr.write(
                    f"stockrelay: error: another server answers on {base}; "
                    "stop it or choose another --port\n"
                )
                return 1
        while not stop.is_set() and _first_exited(children) is None:
            stop.wait(_POLL_SECONDS)
        quit_early = _first_exited(children)
        if quit_early is not None and not stop.is_set():
            sys.stderr.write(
                f"stockrelay: error: the {quit_early.name} exited with code "
                f"{quit_early.exited()}; stopping the others\n"
            )
    finally:
        killed = _stop_all(children)
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    requested = stop.is_set() and not killed
    return 0 if requested else 1


def _start(name: str, argv: list[str], environment: dict[str, str] | None = None) -> Child:
    # stdin from /dev/null: a child must never compete with the terminal for input.
    env = None if environment is None else {**os.environ, **environment}
    return Child(name, subprocess.Popen(argv, stdin=subprocess.DEVNULL, env=env))


def port_problem(host: str, port: int) -> str | None:
    """Why the API could not listen on host:port (e.g. another server holds it), or None.

    Binds and closes a socket the way uvicorn binds (SO_REUSEADDR, so a port left in TIME_WAIT
    by an earlier run counts as free)."""
    try:
        infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
    except socket.gaierror as exc:
        return f"cannot resolve host {host!r}: {exc.strerror or exc}; check --host"
    family, kind, proto, _, address = infos[0]
    with socket.socket(family, kind, proto) as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            probe.bind(address)
        except OSError as exc:
            return (
                f"cannot listen on {host}:{port}: {exc.strerror or exc}; stop what uses it or "
                "choose another --port"
            )
    return None


def ready_answer(base: str, token: str) -> str | None:
    """Who answers `base`/readyz: "ours" (ready, and started with `token`), "other" (any
    other server, whatever its status), or None (nothing answers yet, or ours is not ready)."""
    try:
        with _DIRECT.open(urllib.request.Request(base + "/readyz"), timeout=2) as response:
            return "ours" if response.headers.get(RUN_HEADER) == token else "other"
    except urllib.error.HTTPError as exc:
        # Ours not ready yet (its database unreachable), or another server's error.
        return "other" if exc.headers.get(RUN_HEADER) != token else None
    except OSError:
        return None


def _probe_host(host: str) -> str:
    """Where to reach a server bound to `host` from this machine."""
    if host in ("0.0.0.0", ""):
        return "127.0.0.1"
    if host == "::":
        return "[::1]"
    return f"[{host}]" if ":" in host else host


def _get(url: str, key: str | None = None) -> Any:
    """The JSON body of a 200 answer, None for anything else."""
    request = urllib.request.Request(url)
    if key is not None:
        request.add_header("Authorization", f"Bearer {key}")
    try:
        with _DIRECT.open(request, timeout=2) as response:
            return json.loads(response.read())
    except (OSError, ValueError):
        return None


def _first_exited(children: list[Child]) -> Child | None:
    return next((child for child in children if child.exited() is not None), None)


def _wait(
    probe: Callable[[], bool], stop: threading.Event, children: list[Child], deadline: float
) -> bool:
    """Poll `probe` until true; False on a stop request, an exited child or the deadline."""
    give_up = time.monotonic() + deadline
    while not stop.is_set() and _first_exited(children) is None:
        if probe():
            return True
        if time.monotonic() > give_up:
            sys.stderr.write(f"stockrelay: gave up waiting after {deadline:.0f} s\n")
            return False
        stop.wait(_POLL_SECONDS)
    return False


def _demo_network_id(base: str, key: str) -> int | None:
    networks = _get(base + "/v1/networks", key) or []
    ids = [n["id"] for n in networks if n.get("name") == DEMO_NETWORK["name"]]
    return min(ids) if ids else None


def _discounted_state(base: str, network_id: int, key: str) -> str | None:
    network = _get(f"{base}/v1/networks/{network_id}", key) or {}
    states = [s["state"] for s in network.get("solves", []) if s["criterion"] == "discounted"]
    return states[0] if states else None


def _announce(
    base: str, n_workers: int, stop: threading.Event, children: list[Child], key: str
) -> None:
    """Say where the API is and, once the demo network's policy is ready, how to ask it."""
    workers = f"{n_workers} solve worker" + ("s" if n_workers != 1 else "")
    lines = [f"stockrelay is running: API on {base} (documentation at {base}/docs), {workers}."]
    lines += [
        "",
        "A write key for the demo tenant, made for this run (only its hash is stored):",
        "",
        f"  export STOCKRELAY_KEY={key}",
        "",
    ]
    auth_header = '-H "authorization: Bearer $STOCKRELAY_KEY"'
    network_id = _demo_network_id(base, key)
    if network_id is None:
        lines += ["List the networks:", "", f"  curl -s {base}/v1/networks {auth_header}"]
    else:
        state = None
        if n_workers > 0:

            def settled() -> bool:
                nonlocal state
                state = _discounted_state(base, network_id, key)
                return state in (
                    SolveStatus.READY,
                    SolveStatus.FAILED,
                    SolveStatus.NOT_REQUESTED,
                )

            _wait(settled, stop, children, SOLVE_DEADLINE_SECONDS)
        if stop.is_set():
            return
        body = json.dumps({"stock": DEMO_STOCK})
        lines += [
            "Tonight's recommendation for the demo network:",
            "",
            f"  curl -s -X POST {base}/v1/networks/{network_id}/recommendation "
            f"{auth_header} -H 'content-type: application/json' -d '{body}'",
        ]
        if state != SolveStatus.READY:
            lines += ["", f"(its policy is not ready yet: {state}; until then the answer is 503)"]
    lines += ["", "Ctrl-C stops the API and the workers."]
    sys.stdout.write("\n" + "\n".join(lines) + "\n\n")
    sys.stdout.flush()


def _stop_all(children: list[Child]) -> bool:
    """SIGTERM every running child, wait, SIGKILL stragglers. True when one had to be killed."""
    running = [child for child in children if child.exited() is None]
    if running:
        names = ", ".join(child.name for child in running)
        sys.stderr.write(f"stockrelay: stopping {names}\n")
    for child in running:
        child.process.send_signal(signal.SIGTERM)  # a no-op once it has exited
    give_up = time.monotonic() + STOP_GRACE_SECONDS
    killed = False
    for child in children:
        try:
            child.process.wait(timeout=max(0.0, give_up - time.monotonic()))
        except subprocess.TimeoutExpired:
            sys.stderr.write(f"stockrelay: the {child.name} ignored SIGTERM; killing it\n")
            child.process.kill()
            child.process.wait(timeout=STOP_GRACE_SECONDS)
            killed = True
    return killed
