"""`stockrelay run` (what `make run` starts): the API and a worker as child processes, an example
request that works as printed, and a Ctrl-C that leaves no process behind.

Each run is started in a session of its own, so that its whole process group can be signalled
the way a terminal does on Ctrl-C, and killed outright if a test fails halfway.
"""

from __future__ import annotations

import http.server
import os
import shlex
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager, contextmanager
from dataclasses import dataclass
from pathlib import Path

import httpx2
import pytest

from service.supervisor import ready_answer
from tests.e2e.live import DEMO, ROOT, START_DEADLINE, Live, environment, free_port, migrate

STOP_DEADLINE = 60.0  # the supervisor's own grace period is 45 s


@dataclass
class Run:
    process: subprocess.Popen[bytes]
    out: Path
    err: Path

    def stdout(self) -> str:
        return self.out.read_text(errors="replace")

    def stderr(self) -> str:
        return self.err.read_text(errors="replace")

    def group_alive(self) -> bool:
        try:
            os.killpg(self.process.pid, 0)
        except ProcessLookupError:
            return False
        return True


class Runs:
    def __init__(self, tmp_path: Path) -> None:
        self.tmp_path = tmp_path
        self.started: list[Run] = []

    def start(self, url: str, port: int) -> Run:
        n = len(self.started)
        out, err = self.tmp_path / f"run-{n}.out", self.tmp_path / f"run-{n}.err"
        with out.open("wb") as stdout, err.open("wb") as stderr:
            process = subprocess.Popen(
                [sys.executable, "-m", "service.cli", "run", "--port", str(port)],
                cwd=ROOT,
                env=environment(url, poll_interval=0.1),
                stdin=subprocess.DEVNULL,
                stdout=stdout,
                stderr=stderr,
                start_new_session=True,
            )
        run = Run(process, out, err)
        self.started.append(run)
        return run

    def kill_all(self) -> None:
        for run in self.started:
            if run.group_alive():
                os.killpg(run.process.pid, signal.SIGKILL)
            run.process.wait(timeout=STOP_DEADLINE)


@pytest.fixture
def runs(tmp_path: Path) -> Iterator[Runs]:
    pool = Runs(tmp_path)
    try:
        yield pool
    finally:
        pool.kill_all()


@pytest.fixture
def demo_database(tmp_path: Path) -> str:
    """A migrated SQLite database with the demo network imported, as `make run` prepares it."""
    url = f"sqlite:///{tmp_path / 'stockrelay.db'}"
    migrate(url)
    subprocess.run(
        [sys.executable, "-m", "service.cli", "networks", "import", str(DEMO),
         "--criteria", "discounted,average", "--skip-unchanged"],
        cwd=ROOT, env=environment(url), check=True, capture_output=True, timeout=START_DEADLINE,
    )  # fmt: skip
    return url


def wait_for_exit(run: Run) -> int:
    try:
        return run.process.wait(timeout=STOP_DEADLINE)
    except subprocess.TimeoutExpired:
        pytest.fail(f"stockrelay run did not stop:\n{run.stdout()}\n{run.stderr()}")


def test_ctrl_c_stops_the_api_and_worker_after_the_printed_example_works(
    demo_database: str, runs: Runs
) -> None:
    port = free_port()
    run = runs.start(demo_database, port)
    give_up = time.monotonic() + 2 * START_DEADLINE
    while "curl" not in run.stdout():
        assert run.process.poll() is None, run.stderr()
        assert time.monotonic() < give_up, f"no example printed:\n{run.stdout()}\n{run.stderr()}"
        time.sleep(0.1)
    time.sleep(0.2)  # the rest of the announcement
    [command] = [line.strip() for line in run.stdout().splitlines() if "curl" in line]
    assert "not ready" not in run.stdout(), run.stdout()

    [export] = [line.strip() for line in run.stdout().splitlines() if "STOCKRELAY_KEY=" in line]
    key = export.removeprefix("export STOCKRELAY_KEY=")
    argv = shlex.split(command.replace("$STOCKRELAY_KEY", key))
    assert argv[:4] == ["curl", "-s", "-X", "POST"]
    url, body = argv[4], argv[argv.index("-d") + 1]
    assert url == f"http://127.0.0.1:{port}/v1/networks/1/recommendation"
    assert f"authorization: Bearer {key}" in argv
    response = httpx2.post(
        url,
        content=body,
        headers={"content-type": "application/json", "authorization": f"Bearer {key}"},
    )
    assert response.status_code == 200, response.text
    assert response.json()["transfers"] == [
        {"from": "riverside", "to": "hilltop", "units": 3, "unit_cost": 4.25, "dispatch_cost": 0.0}
    ]

    os.killpg(run.process.pid, signal.SIGINT)  # what the terminal does on Ctrl-C
    assert wait_for_exit(run) == 0, run.stderr()
    assert not run.group_alive(), "a child of stockrelay run survived Ctrl-C"
    with pytest.raises(httpx2.TransportError):
        httpx2.get(f"http://127.0.0.1:{port}/healthz", timeout=2)
    # The key made for the run stops with it.
    prefix = key.split("_")[1]
    [listed] = [line for line in keys_listed(demo_database).splitlines() if prefix in line]
    assert " revoked " in listed, listed


def test_sigterm_to_the_supervisor_alone_stops_its_children(demo_database: str, runs: Runs) -> None:
    port = free_port()
    run = runs.start(demo_database, port)
    give_up = time.monotonic() + 2 * START_DEADLINE
    while "Ctrl-C stops" not in run.stdout():
        assert run.process.poll() is None, run.stderr()
        assert time.monotonic() < give_up, run.stderr()
        time.sleep(0.1)

    run.process.send_signal(signal.SIGTERM)
    assert wait_for_exit(run) == 0, run.stderr()
    assert not run.group_alive(), "a child of stockrelay run survived SIGTERM"


def children_of(pid: int) -> dict[int, str]:
    """Process id -> command line of the direct children of `pid` (Linux /proc)."""
    found = {}
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
            command = (entry / "cmdline").read_bytes().replace(b"\0", b" ").decode()
        except OSError:
            continue
        if int(stat.rsplit(")", 1)[1].split()[1]) == pid:
            found[int(entry.name)] = command
    return found


def test_an_api_that_exits_by_itself_stops_the_worker_too(demo_database: str, runs: Runs) -> None:
    run = runs.start(demo_database, free_port())
    give_up = time.monotonic() + 2 * START_DEADLINE
    while "Ctrl-C stops" not in run.stdout():
        assert run.process.poll() is None, run.stderr()
        assert time.monotonic() < give_up, run.stderr()
        time.sleep(0.1)
    [api] = [pid for pid, argv in children_of(run.process.pid).items() if " serve " in argv]
    os.kill(api, signal.SIGKILL)

    assert wait_for_exit(run) == 1, run.stderr()
    assert "the API exited with code -9; stopping the others" in run.stderr()
    assert "stopping worker 1" in run.stderr()
    assert not run.group_alive()


class _AnyServer(http.server.BaseHTTPRequestHandler):
    """Another program's web server: 200 and a JSON body for any GET."""

    def do_GET(self) -> None:
        body = b'{"status": "ready"}'
        self.send_response(200)
        self.send_header("content-type", "application/json")
        self.send_header("content-length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, *args: object) -> None:
        pass


@contextmanager
def another_server() -> Iterator[int]:
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), _AnyServer)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield server.server_address[1]
    finally:
        server.shutdown()
        server.server_close()


@contextmanager
def silent_listener() -> Iterator[int]:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        yield taken.getsockname()[1]


@pytest.mark.parametrize("holder", [another_server, silent_listener], ids=["http", "silent"])
def test_a_taken_port_is_refused_in_one_line_and_starts_nothing(
    demo_database: str, runs: Runs, holder: Callable[[], AbstractContextManager[int]]
) -> None:
    with holder() as port:
        run = runs.start(demo_database, port)
        code = wait_for_exit(run)

    assert code == 2, run.stderr()
    assert "running" not in run.stdout() and "curl" not in run.stdout(), run.stdout()
    [line] = run.stderr().splitlines()
    assert line.startswith("stockrelay: error: cannot listen on 127.0.0.1:")
    assert "Address already in use" in line and "choose another --port" in line
    assert not run.group_alive()
    assert "demo key" not in keys_listed(demo_database)  # no key was made


def test_the_readiness_check_tells_our_api_from_another_server(
    demo_database: str, live: Live
) -> None:
    token = "a-token-for-this-run"
    with another_server() as port:
        assert ready_answer(f"http://127.0.0.1:{port}", token) == "other"
    with silent_listener() as port:
        pass
    assert ready_answer(f"http://127.0.0.1:{port}", token) is None  # nothing answers now
    base, _ = live.serve(environment(demo_database, run_token=token))
    assert ready_answer(base, token) == "ours"
    assert ready_answer(base, "the token of another run") == "other"


def keys_listed(url: str) -> str:
    listed = subprocess.run(
        [sys.executable, "-m", "service.cli", "keys", "list"],
        cwd=ROOT, env=environment(url), check=True, capture_output=True, timeout=START_DEADLINE,
    )  # fmt: skip
    return listed.stdout.decode()
