"""The database goes away and comes back: 503 problems meanwhile, recovery by itself, nothing
lost. The database is reached through a TCP relay on loopback that the test cuts and restores."""

from __future__ import annotations

import contextlib
import socket
import threading
import time
from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.engine import make_url

from service.db.migrate import upgrade
from service.db.session import make_engine
from service.main import create_app
from service.settings import Settings
from tests.service.api_support import demo_document, make_key, run_worker

STOCK = {"riverside": 13, "hilltop": 1}


class Relay:
    """Forwards 127.0.0.1:port to the PostgreSQL server; `cut` drops every connection and
    refuses new ones, `restore` listens again on the same port."""

    def __init__(self, target: tuple[str, int]) -> None:
        self.target = target
        self.port = 0
        self._listener: socket.socket | None = None
        self._sockets: list[socket.socket] = []
        self._lock = threading.Lock()

    def restore(self) -> None:
        listener = socket.socket()
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind(("127.0.0.1", self.port))
        listener.listen(16)
        self.port = listener.getsockname()[1]
        self._listener = listener
        threading.Thread(target=self._accept, args=(listener,), daemon=True).start()

    def cut(self) -> None:
        with self._lock:
            if self._listener is not None:
                # Shut down first: on Linux a plain close() does not wake the accept() that
                # another thread is blocked in, and the port would go on accepting.
                with contextlib.suppress(OSError):
                    self._listener.shutdown(socket.SHUT_RDWR)
                self._listener.close()
                self._listener = None
            for sock in self._sockets:
                with contextlib.suppress(OSError):
                    sock.shutdown(socket.SHUT_RDWR)
                sock.close()
            self._sockets.clear()

    def _accept(self, listener: socket.socket) -> None:
        while True:
            try:
                client, _ = listener.accept()
            except OSError:
                return
            server = socket.create_connection(self.target, timeout=5)
            server.settimeout(None)
            with self._lock:
                self._sockets += [client, server]
            for a, b in ((client, server), (server, client)):
                threading.Thread(target=self._pump, args=(a, b), daemon=True).start()

    @staticmethod
    def _pump(source: socket.socket, sink: socket.socket) -> None:
        with contextlib.suppress(OSError):
            while data := source.recv(65536):
                sink.sendall(data)
        with contextlib.suppress(OSError):
            sink.shutdown(socket.SHUT_WR)


@pytest.fixture
def relay(postgres_url: str) -> Iterator[tuple[Relay, str]]:
    url = make_url(postgres_url)
    proxy = Relay((url.host or "127.0.0.1", url.port or 5432))
    proxy.restore()
    try:
        yield (
            proxy,
            url.set(host="127.0.0.1", port=proxy.port).render_as_string(hide_password=False),
        )
    finally:
        proxy.cut()


def eventually(probe: object, deadline: float = 20.0) -> None:
    assert callable(probe)
    give_up = time.monotonic() + deadline
    while not probe():
        assert time.monotonic() < give_up, "did not recover in time"
        time.sleep(0.2)


def test_database_outage_gives_503_then_recovers_with_nothing_lost(
    postgres_url: str, relay: tuple[Relay, str]
) -> None:
    proxy, through_relay = relay
    direct = make_engine(postgres_url)
    upgrade(direct)
    key = make_key(direct)
    app = create_app(Settings(database_url=through_relay, key_cache_seconds=0))
    with TestClient(app) as client:
        client.headers["Authorization"] = f"Bearer {key}"
        created = client.post("/v1/networks", json=demo_document())
        assert created.status_code == 201, created.text
        run_worker(direct)
        url = f"/v1/networks/{created.json()['id']}/recommendation"
        before = client.post(url, json={"stock": STOCK})
        assert before.status_code == 200

        proxy.cut()
        for _ in range(3):
            down = client.post(url, json={"stock": STOCK})
            assert down.status_code == 503, down.text
            assert down.headers["content-type"] == "application/problem+json"
            assert down.headers["retry-after"] == "5"
            assert down.json()["type"].endswith("/database-unavailable")
        assert client.get("/readyz").status_code == 503
        assert client.get("/healthz").status_code == 200

        proxy.restore()
        eventually(lambda: client.post(url, json={"stock": STOCK}).status_code == 200)
        assert client.get("/readyz").status_code == 200
        after = client.post(url, json={"stock": STOCK})
        assert after.json() == {**before.json(), "solved_at": after.json()["solved_at"]}
        assert client.get("/v1/networks").json()[0]["version"] == 1
    direct.dispose()


def test_api_starts_without_its_database_and_says_so(relay: tuple[Relay, str]) -> None:
    proxy, through_relay = relay
    proxy.cut()
    with TestClient(create_app(Settings(database_url=through_relay))) as client:
        ready = client.get("/readyz")
        assert ready.status_code == 503
        assert ready.json()["detail"] == "database unreachable"
        response = client.get("/v1/networks", headers={"Authorization": "Bearer sr_x_y"})
        assert response.status_code == 503
