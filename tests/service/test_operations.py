"""The operator commands (`stockrelay migrate | worker | networks | jobs`) run in-process against
SQLite and PostgreSQL, checked through their output and the database they leave behind."""

from __future__ import annotations

import json
import re
import signal
import socket
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import Engine, func, select
from sqlalchemy.orm import Session, sessionmaker

from service import auth, supervisor
from service.cli import main
from service.db.analysis_jobs import enqueue_analysis
from service.db.session import make_engine, make_session_factory
from service.db.tables import Network, NetworkVersion, Policy, SolveJob, Tenant
from service.vocabulary import JobKind
from solver import NetworkSpec
from tests.e2e.live import free_port

DEMO = Path(__file__).resolve().parents[2] / "service" / "data" / "demo_network.json"

Run = Callable[..., tuple[int, str, str]]


def demo_document(**changes: Any) -> dict[str, Any]:
    document: dict[str, Any] = json.loads(DEMO.read_text())
    document.update(changes)
    return document


def with_capacity(document: dict[str, Any], location: int, capacity: int) -> dict[str, Any]:
    locations = [dict(loc) for loc in document["locations"]]
    locations[location]["capacity"] = capacity
    return {**document, "locations": locations}


def write(path: Path, document: dict[str, Any]) -> Path:
    path.write_text(json.dumps(document), encoding="utf-8")
    return path


@pytest.fixture
def run(
    database_url: str, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> Iterator[Run]:
    """`stockrelay ARGS...` in-process on a migrated database: (exit code, stdout, stderr).

    The worker command installs SIGTERM/SIGINT handlers; they are restored afterwards so this
    pytest process still stops on Ctrl-C.
    """
    for name in ("STOCKRELAY_MAX_STATES", "STOCKRELAY_MAX_ATTEMPTS", "STOCKRELAY_LEASE_SECONDS"):
        monkeypatch.delenv(name, raising=False)
    monkeypatch.setenv("STOCKRELAY_DATABASE_URL", database_url)
    monkeypatch.setenv("STOCKRELAY_POLL_INTERVAL", "0.05")
    saved = {sig: signal.getsignal(sig) for sig in (signal.SIGTERM, signal.SIGINT)}

    def invoke(*argv: str) -> tuple[int, str, str]:
        code = main(list(argv))
        captured = capsys.readouterr()
        return code, captured.out, captured.err

    try:
        assert invoke("migrate")[0] == 0
        yield invoke
    finally:
        for sig, handler in saved.items():
            signal.signal(sig, handler)


@pytest.fixture
def sessions(database_url: str) -> Iterator[sessionmaker[Session]]:
    """Read access for checks (overrides conftest's, which would migrate a second time)."""
    engine: Engine = make_engine(database_url)
    yield make_session_factory(engine)
    engine.dispose()


def jobs(sessions: sessionmaker[Session]) -> list[SolveJob]:
    with sessions() as session:
        return list(session.scalars(select(SolveJob).order_by(SolveJob.id)))


def rows(sessions: sessionmaker[Session], table: type[Any]) -> int:
    with sessions() as session:
        return int(session.scalar(select(func.count()).select_from(table)) or 0)


def assert_one_line_error(code: int, out: str, err: str) -> None:
    assert code == 2
    assert out == ""
    assert err.count("\n") == 1 and err.startswith("stockrelay: error: ")


IMPORTED = re.compile(
    r"^network (\d+) version (\d+) \(sha256 ([0-9a-f]{12})\); jobs queued: (.*)\n$"
)


def parse_import(out: str) -> tuple[int, int, str, str]:
    match = IMPORTED.match(out)
    assert match is not None, out
    return int(match[1]), int(match[2]), match[3], match[4]


def test_import_versions_and_queues_only_what_is_needed(
    run: Run, sessions: sessionmaker[Session], tmp_path: Path
) -> None:
    code, out, err = run("networks", "import", str(DEMO), "--criteria", "discounted,average")
    assert (code, err) == (0, "")
    network, version, first_hash, queued = parse_import(out)
    assert (network, version, queued) == (1, 1, "1 (discounted), 2 (average)")
    assert [(j.id, j.state, j.criterion, j.attempts) for j in jobs(sessions)] == [
        (1, "queued", "discounted", 0),
        (2, "queued", "average", 0),
    ]

    # An identical specification shares the jobs already queued for it.
    code, out, _ = run("networks", "import", str(DEMO), "--criteria", "discounted,average")
    assert code == 0
    assert parse_import(out) == (1, 2, first_hash, "none needed")
    assert len(jobs(sessions)) == 2

    changed = write(tmp_path / "changed.json", with_capacity(demo_document(), 1, 11))
    code, out, _ = run("networks", "import", str(changed))
    assert code == 0
    network, version, changed_hash, queued = parse_import(out)
    # PostgreSQL spends sequence numbers on the refused duplicate inserts, so ids may skip.
    new_job = jobs(sessions)[-1]
    assert (network, version, queued) == (1, 3, f"{new_job.id} (discounted)")
    assert (new_job.state, new_job.spec_hash[:12]) == ("queued", changed_hash)
    assert changed_hash != first_hash

    with sessions() as session:
        versions = session.scalars(select(NetworkVersion).order_by(NetworkVersion.number)).all()
        assert [v.number for v in versions] == [1, 2, 3]
        assert versions[0].spec_hash == versions[1].spec_hash != versions[2].spec_hash
        assert [j.version_id for j in jobs(sessions)] == [versions[0].id] * 2 + [versions[2].id]
    assert rows(sessions, Network) == rows(sessions, Tenant) == 1


def test_import_refuses_a_network_beyond_the_size_limits_in_one_line(
    run: Run, sessions: sessionmaker[Session], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The import goes through the same size check as POST and PUT /v1/networks: the demo
    network's 15 x 10 = 150 stock states are refused in exact mode under a limit of 10, as a
    new network and as a new version, and nothing is written."""
    monkeypatch.setenv("STOCKRELAY_MAX_STATES", "10")
    code, out, err = run("networks", "import", str(DEMO), "--mode", "exact")
    assert_one_line_error(code, out, err)
    assert "150 stock states" in err
    assert (
        rows(sessions, Network) == rows(sessions, NetworkVersion) == rows(sessions, SolveJob) == 0
    )

    monkeypatch.delenv("STOCKRELAY_MAX_STATES")
    assert run("networks", "import", str(DEMO), "--mode", "exact")[0] == 0
    monkeypatch.setenv("STOCKRELAY_MAX_STATES", "10")
    changed = write(tmp_path / "changed.json", with_capacity(demo_document(), 1, 11))
    code, out, err = run("networks", "import", str(changed))
    assert_one_line_error(code, out, err)
    assert "stock states" in err
    assert rows(sessions, NetworkVersion) == rows(sessions, SolveJob) == 1


def test_identical_import_after_solving_reuses_the_stored_policy(
    run: Run, sessions: sessionmaker[Session]
) -> None:
    run("networks", "import", str(DEMO), "--criteria", "discounted,average")
    assert run("worker", "--until-idle")[0] == 0
    assert rows(sessions, Policy) == 2

    code, out, _ = run("networks", "import", str(DEMO), "--criteria", "average,discounted")
    _, version, _, queued = parse_import(out)
    assert (code, version, queued) == (0, 2, "none needed")
    assert len(jobs(sessions)) == 2
    assert rows(sessions, Policy) == 2


def test_export_prints_the_chosen_version(
    run: Run, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    changed_document = with_capacity(demo_document(), 0, 12)
    run("networks", "import", str(DEMO))
    run("networks", "import", str(write(tmp_path / "changed.json", changed_document)))

    code, out, err = run("networks", "export", "1")
    assert (code, err) == (0, "")
    assert NetworkSpec.model_validate(json.loads(out)) == NetworkSpec.model_validate(
        changed_document
    )

    code, out, _ = run("networks", "export", "1", "--version", "1")
    assert code == 0
    assert NetworkSpec.model_validate(json.loads(out)) == NetworkSpec.model_validate(
        demo_document()
    )

    target = tmp_path / "exported.json"
    code, out, _ = run("networks", "export", "1", "--version", "2", "--out", str(target))
    assert (code, out) == (0, "")
    assert NetworkSpec.model_validate_json(target.read_text()) == NetworkSpec.model_validate(
        changed_document
    )

    assert_one_line_error(*run("networks", "export", "1", "--version", "3"))
    assert_one_line_error(*run("networks", "export", "7"))


def test_networks_list_shows_each_network_with_its_latest_version(run: Run, tmp_path: Path) -> None:
    assert run("networks", "list") == (0, "", "")
    other = write(tmp_path / "other.json", demo_document(name="Ladders: Quayside and Mill Lane"))
    run("networks", "import", str(DEMO))
    run("networks", "import", str(write(tmp_path / "v2.json", demo_document(discount=0.995))))
    run("networks", "import", str(other))

    code, out, err = run("networks", "list")
    assert (code, err) == (0, "")
    assert out.splitlines() == [
        "    1  Cordless drill kits: Riverside and Hilltop hardware  version 2",
        "    2  Ladders: Quayside and Mill Lane  version 1",
    ]


def test_jobs_list_filters_by_state_and_the_worker_drains_the_queue(
    run: Run, sessions: sessionmaker[Session]
) -> None:
    run("networks", "import", str(DEMO), "--criteria", "discounted,average")

    code, out, err = run("jobs", "list")
    assert (code, err) == (0, "")
    lines = out.splitlines()
    assert len(lines) == 2
    # Newest first.
    assert lines[0].split()[:8] == [
        "2", "queued", "solve", "average", "network", "1", "version", "1"
    ]  # fmt: skip
    assert lines[1].split()[:4] == ["1", "queued", "solve", "discounted"]
    assert all(line.endswith("attempts 0") for line in lines)
    assert run("jobs", "list", "--state", "queued")[1] == out
    assert run("jobs", "list", "--state", "done") == (0, "", "")
    assert run("jobs", "list", "--limit", "1")[1] == lines[0] + "\n"

    assert run("worker", "--until-idle") == (0, "", "")

    assert run("jobs", "list", "--state", "queued") == (0, "", "")
    code, out, _ = run("jobs", "list", "--state", "done")
    done = out.splitlines()
    assert [line.split()[:4] for line in done] == [
        ["2", "done", "solve", "average"],
        ["1", "done", "solve", "discounted"],
    ]
    assert all(re.search(r"attempts 1  \d+\.\d{3} s$", line) for line in done), done
    assert [(j.state, j.attempts) for j in jobs(sessions)] == [("done", 1), ("done", 1)]
    assert rows(sessions, Policy) == 2


def test_retry_requeues_a_failed_job_and_refuses_any_other(
    run: Run, sessions: sessionmaker[Session], monkeypatch: pytest.MonkeyPatch
) -> None:
    run("networks", "import", str(DEMO))
    # The demo network has 15 x 10 = 150 stock states; a worker limited to 10 refuses it.
    monkeypatch.setenv("STOCKRELAY_MAX_STATES", "10")
    assert run("worker", "--until-idle")[0] == 0
    [job] = jobs(sessions)
    assert (job.state, job.attempts) == ("failed", 1)
    assert job.error is not None and "150 stock states" in job.error
    code, out, _ = run("jobs", "list", "--state", "failed")
    assert code == 0 and out.count("\n") == 1 and "error: network has 150 stock states" in out

    assert run("jobs", "retry", str(job.id)) == (0, f"job {job.id} queued again\n", "")
    [job] = jobs(sessions)
    assert (job.state, job.attempts, job.error, job.finished_at) == ("queued", 0, None, None)
    # Only failed jobs can be retried: queued, done and missing ones are refused.
    assert_one_line_error(*run("jobs", "retry", str(job.id)))

    monkeypatch.delenv("STOCKRELAY_MAX_STATES")
    assert run("worker", "--until-idle")[0] == 0
    [job] = jobs(sessions)
    assert (job.state, job.attempts, job.error) == ("done", 1, None)
    assert rows(sessions, Policy) == 1
    assert_one_line_error(*run("jobs", "retry", str(job.id)))
    code, out, err = run("jobs", "retry", "99")
    assert_one_line_error(code, out, err)
    assert err == "stockrelay: error: no job 99\n"
    assert [(j.state, j.attempts) for j in jobs(sessions)] == [("done", 1)]


@pytest.mark.parametrize(
    ("content", "expected"),
    [
        ("{not json", "not valid JSON"),
        (json.dumps(with_capacity(demo_document(), 0, 0)), "locations.0.capacity"),
        (json.dumps(demo_document(lanes=[])), "lanes"),
    ],
    ids=["syntax", "capacity", "no-lanes"],
)
def test_a_bad_network_file_is_refused_and_writes_nothing(
    run: Run, sessions: sessionmaker[Session], tmp_path: Path, content: str, expected: str
) -> None:
    bad = tmp_path / "bad.json"
    bad.write_text(content, encoding="utf-8")

    code, out, err = run("networks", "import", str(bad), "--criteria", "discounted,average")

    assert_one_line_error(code, out, err)
    assert str(bad) in err and expected in err
    for table in (Tenant, Network, NetworkVersion, SolveJob, Policy):
        assert rows(sessions, table) == 0, table.__tablename__


def test_a_missing_network_file_is_refused(run: Run, tmp_path: Path) -> None:
    code, out, err = run("networks", "import", str(tmp_path / "absent.json"))
    assert_one_line_error(code, out, err)
    assert "cannot read" in err


def test_invalid_settings_are_refused_naming_the_variable(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    database = tmp_path / "never-created" / "stockrelay.db"
    monkeypatch.setenv("STOCKRELAY_DATABASE_URL", f"sqlite:///{database}")
    monkeypatch.setenv("STOCKRELAY_LEASE_SECONDS", "-1")

    for argv in (["migrate"], ["jobs", "list"], ["networks", "import", str(DEMO)]):
        code = main(argv)
        captured = capsys.readouterr()
        assert_one_line_error(code, captured.out, captured.err)
        assert "STOCKRELAY_LEASE_SECONDS" in captured.err
    assert not database.parent.exists()


def test_only_migrate_creates_a_database_and_the_others_name_the_one_they_looked_for(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    monkeypatch.chdir(tmp_path)  # run from another folder, with the default URL
    monkeypatch.delenv("STOCKRELAY_DATABASE_URL", raising=False)
    expected = tmp_path / "var" / "stockrelay.db"
    commands = (
        ["jobs", "list"],
        ["jobs", "retry", "1"],
        ["networks", "list"],
        ["networks", "import", str(DEMO)],
        ["networks", "export", "1"],
        ["keys", "list"],
        ["keys", "create", "--tenant", "t", "--scope", "read"],
        ["worker", "--until-idle"],
        ["serve"],
        ["run"],
    )
    for argv in commands:
        code = main(argv)
        captured = capsys.readouterr()
        assert_one_line_error(code, captured.out, captured.err)
        assert str(expected) in captured.err and "stockrelay migrate" in captured.err, argv
        assert not (tmp_path / "var").exists(), argv

    assert main(["migrate"]) == 0
    assert expected.is_file()
    capsys.readouterr()
    assert main(["networks", "list"]) == 0


def test_jobs_list_shows_network_version_number_and_every_kind(
    run: Run, sessions: sessionmaker[Session], tmp_path: Path
) -> None:
    # Two networks, the second with two versions: version numbers differ from row ids.
    run("networks", "import", str(DEMO))
    other = write(tmp_path / "other.json", demo_document(name="Other store pair"))
    run("networks", "import", str(other))
    run("networks", "import", str(write(tmp_path / "o2.json", demo_document(
        name="Other store pair", discount=0.9))))  # fmt: skip
    with sessions.begin() as session:
        version = session.scalars(select(NetworkVersion).where(NetworkVersion.number == 2)).one()
        tenant_id = session.scalars(select(Tenant.id)).one()
        simulation = enqueue_analysis(
            session, tenant_id, version, JobKind.SIMULATE, "average", "{}"
        ).id

    code, out, err = run("jobs", "list")
    assert (code, err) == (0, "")
    shown = [line.split()[:8] for line in out.splitlines()]
    assert shown == [
        [str(simulation), "queued", "simulate", "average", "network", "2", "version", "2"],
        ["3", "queued", "solve", "discounted", "network", "2", "version", "2"],
        ["2", "queued", "solve", "discounted", "network", "2", "version", "1"],
        ["1", "queued", "solve", "discounted", "network", "1", "version", "1"],
    ]
    _, only_simulations, _ = run("jobs", "list", "--kind", "simulate")
    assert [line.split()[0] for line in only_simulations.splitlines()] == [str(simulation)]
    _, solves, _ = run("jobs", "list", "--kind", "solve")
    assert [line.split()[0] for line in solves.splitlines()] == ["3", "2", "1"]
    assert run("jobs", "list", "--kind", "what_if") == (0, "", "")


def test_user_mistakes_are_one_line_never_a_traceback(
    run: Run, monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    blocker = tmp_path / "a-file"
    blocker.write_text("")
    code, out, err = run("openapi", "--out", str(tmp_path / "missing" / "openapi.json"))
    assert_one_line_error(code, out, err)
    assert "cannot write" in err and "No such file or directory" in err

    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        code, out, err = run("serve", "--port", str(taken.getsockname()[1]))
    assert_one_line_error(code, out, err)
    assert "Address already in use" in err and "--port" in err

    for url, expected in [
        ("mysql://someone@db/stock", "SQLite or PostgreSQL"),
        ("not a url", "not a database URL"),
        (f"sqlite:///{blocker}/stockrelay.db", "cannot create the database"),
        ("postgresql://nobody@127.0.0.1:1/none", "cannot use database"),  # nothing listens on 1
    ]:
        monkeypatch.setenv("STOCKRELAY_DATABASE_URL", url)
        code, out, err = run("migrate")
        assert_one_line_error(code, out, err)
        assert expected in err, err


def test_run_revokes_its_key_when_it_stops_even_on_ctrl_c(
    run: Run, sessions: sessionmaker[Session], monkeypatch: pytest.MonkeyPatch
) -> None:
    keys: list[str] = []

    def supervise(host: str, port: int, workers: int, key: str) -> int:
        with sessions() as session:
            assert auth.authenticate(session, key) is not None  # usable while running
        keys.append(key)
        if len(keys) == 2:
            raise KeyboardInterrupt
        return 0

    monkeypatch.setattr(supervisor, "supervise", supervise)
    port = str(free_port())
    code, _, err = run("run", "--port", port)
    assert code == 0 and "is revoked" in err
    code, _, err = run("run", "--port", port)
    assert (code, err.splitlines()[-1]) == (130, "stockrelay: interrupted")
    with sessions() as session:
        assert [auth.authenticate(session, key) for key in keys] == [None, None]


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["jobs", "retry", "99999999999"], "expected a whole number 1..2147483647"),
        (["networks", "export", "3000000000"], "expected a whole number 1..2147483647"),
        (["networks", "export", "1", "--version", "0"], "expected a whole number 1.."),
        (["keys", "create", "--tenant", "t", "--scope", "read", "--label", "x" * 201],
         "at most 200 characters"),
        (["keys", "create", "--tenant", "x" * 101, "--scope", "read"], "1 to 100 printable"),
        (["networks", "import", str(DEMO), "--tenant", " "], "1 to 100 printable"),
    ],
)  # fmt: skip
def test_values_the_database_cannot_hold_are_refused_by_the_parser(
    run: Run, capsys: pytest.CaptureFixture[str], argv: list[str], message: str
) -> None:
    # Beyond INTEGER or a column's width, PostgreSQL would fail the statement with a traceback.
    with pytest.raises(SystemExit) as refused:
        run(*argv)
    assert refused.value.code == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert message in err.splitlines()[-1], err
