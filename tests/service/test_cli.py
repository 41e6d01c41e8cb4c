"""The `stockrelay solve` contract that other tools rely on."""

from __future__ import annotations

import argparse
import json
import re
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from service import cli
from service.analysis import run_simulation
from service.analysis_requests import SimulationRequest
from service.cli import main
from solver import NetworkSpec, solve_network
from tests.service.api_support import weekly_document

DEMO = Path(__file__).resolve().parents[2] / "service" / "data" / "demo_network.json"


def run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = main(argv)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def demo_document() -> dict[str, Any]:
    document: dict[str, Any] = json.loads(DEMO.read_text())
    return document


def test_solve_writes_the_documented_result(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "result.json"
    code, stdout, stderr = run(["solve", str(DEMO), "--out", str(out)], capsys)
    assert (code, stderr) == (0, "")
    assert "states      150" in stdout
    assert "net units moved riverside -> hilltop" in stdout

    result = json.loads(out.read_text())
    assert set(result) == {
        "network", "criterion", "states", "lanes", "value", "policy", "gain", "iterations",
        "residual", "seconds",
    }  # fmt: skip
    expected = solve_network(NetworkSpec.model_validate(demo_document()))
    assert result["criterion"] == "discounted"
    assert result["gain"] is None
    assert result["states"] == 15 * 10 == len(result["value"]) == len(result["policy"])
    assert result["lanes"] == [
        {"from": "riverside", "to": "hilltop"},
        {"from": "hilltop", "to": "riverside"},
    ]
    np.testing.assert_allclose(result["value"], expected.values[0], rtol=1e-12)
    # Row-major order, first location slowest: state (riverside=14, hilltop=0) is index 140.
    assert tuple(result["policy"][14 * 10 + 0]) == expected.recommend([14, 0]).flows


def test_average_criterion_reports_gain_and_bias(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "result.json"
    code, stdout, _ = run(["solve", str(DEMO), "--criterion", "average", "--out", str(out)], capsys)
    result = json.loads(out.read_text())
    assert code == 0
    assert result["criterion"] == "average"
    assert result["gain"] > 0
    assert result["value"][0] == 0.0
    assert "profit/day" in stdout


def test_weekly_network_reports_one_policy_per_weekday(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    document = weekly_document()
    network, out = tmp_path / "weekly.json", tmp_path / "result.json"
    network.write_text(json.dumps(document))
    code, stdout, _ = run(["solve", str(network), "--out", str(out)], capsys)
    assert code == 0
    assert "states      150 x 7 weekdays" in stdout
    assert stdout.count("net units moved riverside -> hilltop") == 7
    assert "sun night: net units moved" in stdout
    result = json.loads(out.read_text())
    assert result["weekdays"] == ["mon", "tue", "wed", "thu", "fri", "sat", "sun"]
    expected = solve_network(NetworkSpec.model_validate(document))
    np.testing.assert_allclose(result["value"], expected.values, rtol=1e-12)
    assert np.array(result["policy"]).shape == (7, 150, 2)


def bad_input(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], network: Path, *options: str
) -> tuple[str, Path]:
    out = tmp_path / "result.json"
    out.write_text("previous result")
    code, stdout, stderr = run(["solve", str(network), "--out", str(out), *options], capsys)
    assert code == 2
    assert stdout == ""
    assert stderr.count("\n") == 1 and stderr.startswith("stockrelay: error: ")
    assert out.read_text() == "previous result"
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".result")] == []
    return stderr, out


def test_missing_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    stderr, _ = bad_input(tmp_path, capsys, tmp_path / "nowhere.json")
    assert "cannot read" in stderr


def test_broken_json(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    network = tmp_path / "network.json"
    network.write_text('{"name": "x",')
    stderr, _ = bad_input(tmp_path, capsys, network)
    assert "not valid JSON" in stderr


def test_every_specification_problem_on_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    document = demo_document()
    document["locations"][0]["demand"]["variance"] = 1.0
    document["lanes"][0]["to"] = "harbour"
    network = tmp_path / "network.json"
    network.write_text(json.dumps(document))
    stderr, _ = bad_input(tmp_path, capsys, network)
    assert "locations.0.demand.negative_binomial: Value error, variance (1) must exceed" in stderr


def test_network_over_the_size_limit(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    document = demo_document()
    for location in document["locations"]:
        location["capacity"] = 2000
    network = tmp_path / "network.json"
    network.write_text(json.dumps(document))
    stderr, _ = bad_input(tmp_path, capsys, network, "--mode", "exact")
    assert "4,004,001 stock states" in stderr and "2,000,000" in stderr
    assert "mode 'priced'" in stderr


def test_console_script_runs_as_installed(tmp_path: Path) -> None:
    completed = subprocess.run(
        [sys.executable, "-m", "service.cli", "solve", str(DEMO)],
        capture_output=True,
        text=True,
        check=False,
    )
    assert completed.returncode == 0, completed.stderr
    assert completed.stdout.startswith("network     Cordless drill kits")
    usage = subprocess.run(
        [sys.executable, "-m", "service.cli", "solve"], capture_output=True, text=True, check=False
    )
    assert usage.returncode == 2


PROGRESS_LINE = re.compile(r"^stockrelay: iteration (\d+), residual \S+, \d+\.\d s elapsed$")


def test_solve_reports_progress_on_stderr_once_it_takes_long(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setattr(cli, "PROGRESS_AFTER_SECONDS", 0.0)  # as if every solve were long
    monkeypatch.setattr(cli, "PROGRESS_EVERY_SECONDS", 0.0)
    code, out, err = run(["solve", str(DEMO)], capsys)

    assert code == 0
    iterations = int(re.search(r"^iterations\s+(\d+)", out, re.MULTILINE)[1])  # type: ignore[index]
    matches = [PROGRESS_LINE.match(line) for line in err.splitlines()]
    assert all(matches), err
    assert [int(m[1]) for m in matches if m] == list(range(1, iterations + 1))


def test_ctrl_c_during_a_long_solve_exits_130_in_one_line(tmp_path: Path) -> None:
    # Value iteration at discount 0.997 on 151 x 151 stock levels runs for many seconds.
    document = demo_document()
    for location in document["locations"]:
        location["capacity"] = 150
    network = tmp_path / "slow.json"
    network.write_text(json.dumps(document))
    err = tmp_path / "err.txt"
    with err.open("wb") as sink:
        process = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "solve", str(network), "--method",
             "value-iteration"],
            stdout=subprocess.DEVNULL, stderr=sink,
        )  # fmt: skip
    try:
        give_up = time.monotonic() + 60
        while "iteration" not in err.read_text():  # progress: the solve is under way
            assert process.poll() is None, err.read_text()
            assert time.monotonic() < give_up, "no progress printed within 60 s"
            time.sleep(0.1)
        process.send_signal(signal.SIGINT)
        assert process.wait(timeout=60) == 130
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    lines = err.read_text().splitlines()
    assert all(PROGRESS_LINE.match(line) for line in lines[:-1]), lines
    assert lines[-1] == "stockrelay: interrupted"


@pytest.mark.parametrize("limit", ["0", "-1", "many"])
def test_job_list_limit_must_be_positive(limit: str, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as info:
        main(["jobs", "list", "--limit", limit])
    assert info.value.code == 2
    assert "expected a whole number >= 1" in capsys.readouterr().err


# -- stockrelay simulate ------------------------------------------------------------------------

SHORT = ["--days", "60", "--replications", "20", "--warmup", "5"]


def test_simulate_prints_one_row_per_policy(capsys: pytest.CaptureFixture[str]) -> None:
    code, table, stderr = run(["simulate", str(DEMO), *SHORT, "--seed", "9"], capsys)
    assert (code, stderr) == (0, "")
    _, document, _ = run(["simulate", str(DEMO), *SHORT, "--seed", "9", "--json"], capsys)
    report = json.loads(document)

    assert "20 replications of 60 days after 5 warm-up days, seed 9" in table
    assert "start stock  riverside 7, hilltop 4" in table
    rows = {line.split()[0]: line for line in table.splitlines()[6:9]}
    assert table.endswith(f"\n\n{cli.CAUTION}\n")
    assert list(rows) == ["optimal", "do_nothing", "balance_cover"]
    for policy in report["policies"]:
        profit = policy["profit_per_day"]
        row = rows[policy["name"]]
        assert row.split()[1:6] == [
            f"{profit['mean']:.2f}",
            f"({profit['low']:.2f}",
            "to",
            f"{profit['high']:.2f})",
            f"{policy['fill_rate']['mean']:.1%}",
        ]
    assert rows["optimal"].endswith("  -")


def test_simulate_takes_the_solving_mode(capsys: pytest.CaptureFixture[str]) -> None:
    """--mode as for `solve`: priced simulates the priced policy in place of the optimal one,
    reporting its solve's progress; auto keeps a network within the exact limits exact."""
    names, progress = {}, {}
    for mode in ("priced", "auto"):
        argv = ["simulate", str(DEMO), *SHORT, "--seed", "3", "--mode", mode, "--json"]
        code, document, progress[mode] = run(argv, capsys)
        assert code == 0
        names[mode] = [policy["name"] for policy in json.loads(document)["policies"]]
    # The priced solve reports its stages on stderr, as `solve --mode priced` does.
    assert progress["priced"].startswith("pricing: iteration 1,")
    assert progress["auto"] == ""
    assert names["priced"][0] == "priced" and "optimal" not in names["priced"]
    assert names["auto"][0] == "optimal" and "priced" not in names["auto"]


def test_simulate_json_is_the_report_and_repeats_with_its_seed(
    capsys: pytest.CaptureFixture[str],
) -> None:
    argv = ["simulate", str(DEMO), *SHORT, "--criterion", "discounted", "--seed", "17", "--json"]
    code, first, stderr = run(argv, capsys)
    assert (code, stderr) == (0, "")
    _, second, _ = run(argv, capsys)
    assert first == second

    report = json.loads(first)
    assert (report["criterion"], report["seed"], report["days"]) == ("discounted", 17, 60)
    # The same request through the service's computation gives the same report.
    params = SimulationRequest(
        criterion="discounted", days=60, replications=20, warmup_days=5, seed=17
    )
    assert report == run_simulation(NetworkSpec.model_validate(demo_document()), params)


@pytest.mark.parametrize(
    ("arguments", "message"),
    [
        (["nowhere.json"], "cannot read"),
        ([str(DEMO), "--days", "0"], "--days: Input should be greater than or equal to 1"),
        ([str(DEMO), "--warmup", "400"], "--warmup: Input should be less than or equal to 365"),
        (
            [str(DEMO), "--days", "3650", "--replications", "2000"],
            "over the limit of 2,000,000",
        ),
    ],
)
def test_simulate_bad_input_is_one_line(
    arguments: list[str], message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    code, stdout, stderr = run(["simulate", *arguments], capsys)
    assert (code, stdout) == (2, "")
    assert stderr.count("\n") == 1 and stderr.startswith("stockrelay: error: ")
    assert message in stderr


# -- BLAS threads -------------------------------------------------------------------------------


@pytest.mark.parametrize(("setting", "expected"), [(None, 1), ("3", 3)])
@pytest.mark.parametrize("command", ["solve", "simulate"])
def test_cli_work_uses_the_configured_blas_threads(
    command: str,
    setting: str | None,
    expected: int,
    blas_threads: Callable[[], set[int]],
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    if setting is None:
        monkeypatch.delenv("STOCKRELAY_BLAS_THREADS", raising=False)
    else:
        monkeypatch.setenv("STOCKRELAY_BLAS_THREADS", setting)
    threadpool_limits(limits=2, user_api="blas")  # as a 2-core machine starts
    seen: list[set[int]] = []
    name = "solve_network" if command == "solve" else "run_simulation"
    real = getattr(cli, name)

    def watched(*args: Any, **kwargs: Any) -> Any:
        seen.append(blas_threads())
        return real(*args, **kwargs)

    monkeypatch.setattr(cli, name, watched)
    code, _, _ = run([command, str(DEMO), *(SHORT if command == "simulate" else [])], capsys)
    assert code == 0
    assert seen == [{expected}]


# -- help, names and summaries ------------------------------------------------------------------


def commands(
    parser: argparse.ArgumentParser, path: tuple[str, ...] = ()
) -> Iterator[tuple[tuple[str, ...], argparse.ArgumentParser, str | None]]:
    """Every (sub)command: its words, its parser and the help its parent lists for it."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            listed = {choice.dest: choice.help for choice in action._choices_actions}
            for name, sub in action.choices.items():
                yield (*path, name), sub, listed.get(name)
                yield from commands(sub, (*path, name))


def test_every_command_and_option_says_what_it_does(capsys: pytest.CaptureFixture[str]) -> None:
    found = list(commands(cli._parser()))
    assert len(found) > 15
    for words, parser, listed in found:
        assert listed, f"{' '.join(words)} has no help line"
        if any(isinstance(a, argparse._SubParsersAction) for a in parser._actions):
            continue
        assert parser.description, f"`stockrelay {' '.join(words)} --help` says nothing"
        for action in parser._actions:
            if isinstance(action, argparse._HelpAction):
                continue
            assert action.help, f"{' '.join(words)} {action.dest} has no help text"
        with pytest.raises(SystemExit):
            main([*words, "--help"])
        text = capsys.readouterr().out
        assert "%%" not in text, text
    with pytest.raises(SystemExit):
        main(["simulate", "--help"])
    assert "with 95% intervals" in capsys.readouterr().out


@pytest.mark.parametrize(
    ("argv", "dest", "old"),
    [(["serve"], "processes", "--workers"), (["run"], "solve_workers", "--workers")],
)
def test_renamed_options_keep_their_old_spelling_with_a_note(
    argv: list[str], dest: str, old: str, capsys: pytest.CaptureFixture[str]
) -> None:
    parser = cli._parser()
    new = "--" + dest.replace("_", "-")
    assert getattr(parser.parse_args([*argv, new, "3"]), dest) == 3
    assert capsys.readouterr().err == ""
    assert getattr(parser.parse_args([*argv, old, "4"]), dest) == 4
    assert capsys.readouterr().err == f"stockrelay: note: {old} is now {new}\n"
    with pytest.raises(SystemExit):
        parser.parse_args([*argv, "--help"])
    shown = capsys.readouterr().out
    assert new in shown and old not in shown


def three_stores() -> dict[str, Any]:
    document = demo_document()
    document["name"] = "Three hardware stores"
    document["locations"].append(
        {"id": "lakeside", "capacity": 8, "unit_margin": 36.0, "holding_cost": 0.4,
         "stockout_penalty": 6.0, "demand": {"dist": "poisson", "mean": 2.1},
         "replenishment": {"dist": "poisson", "mean": 1.2}}
    )  # fmt: skip
    document["lanes"] += [
        {"from": "riverside", "to": "lakeside", "unit_cost": 3.5, "max_units": 3},
        {"from": "lakeside", "to": "hilltop", "unit_cost": 5.0, "max_units": 2},
    ]
    return document


def expected_moves(spec: NetworkSpec, flows: tuple[int, ...]) -> str:
    lanes = zip(spec.lanes, flows, strict=True)
    moved = [f"{lane.from_} -> {lane.to} {n}" for lane, n in lanes if n]
    return ", ".join(moved) or "move nothing"


def test_three_store_summary_shows_moves_from_representative_and_given_stocks(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    network = tmp_path / "three.json"
    network.write_text(json.dumps(three_stores()))
    code, out, err = run(
        ["solve", str(network), "--stock", "lakeside=0,riverside=13,hilltop=1"], capsys
    )
    assert (code, err) == (0, "")

    spec = NetworkSpec.model_validate(three_stores())
    result = solve_network(spec)
    lines = out.splitlines()
    shown = {
        line.split(": ", 1)[0].strip(): line.split(": ", 1)[1]
        for line in lines
        if line.startswith("  ") and ": " in line
    }
    expected_stocks = {
        "riverside 7, hilltop 4, lakeside 4": (7, 4, 4),  # half full
        "riverside 14, hilltop 0, lakeside 0": (14, 0, 0),  # each full in turn
        "riverside 0, hilltop 9, lakeside 0": (0, 9, 0),
        "riverside 0, hilltop 0, lakeside 8": (0, 0, 8),
    }
    for label, stock in expected_stocks.items():
        recommendation = result.recommend(stock)
        assert shown[label].startswith(expected_moves(spec, recommendation.flows)), label
    asked = result.recommend((13, 1, 0))
    [given] = [lines[i + 1] for i, line in enumerate(lines) if line.startswith("from closing")]
    assert given.strip().startswith(expected_moves(spec, asked.flows))
    assert f"(gain {asked.gain_from_transfers:.2f})" in given or asked.flows == (0, 0, 0, 0)
    assert any(n for n in asked.flows)  # the example is one that moves something
    assert out.endswith(f"\n\n{cli.CAUTION}\n")


@pytest.mark.parametrize(
    ("stock", "message"),
    [
        ("riverside=13,hilltop=1", "no units given for 'lakeside'"),
        ("riverside=13,hilltop=1,lakeside=0,pier=2", "no location 'pier'"),
        ("riverside=15,hilltop=1,lakeside=0", "riverside 15 is outside 0..14"),
    ],
)
def test_a_bad_stock_is_one_line_before_solving(
    stock: str, message: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    network = tmp_path / "three.json"
    network.write_text(json.dumps(three_stores()))
    code, out, err = run(["solve", str(network), "--stock", stock], capsys)
    assert (code, out) == (2, "")
    assert err.count("\n") == 1 and message in err
