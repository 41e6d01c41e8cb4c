"""The `stockrelay solve` contract that other tools rely on."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.analysis import run_simulation
from service.cli import main
from service.schemas import SimulationRequest
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
    rows = {line.split()[0]: line for line in table.splitlines()[6:]}
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
