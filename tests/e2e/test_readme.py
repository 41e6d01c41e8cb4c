"""The README's examples run as written and print what the README says.

* HTTP API: the `curl` command is sent to a live `stockrelay serve` (with a worker) prepared the
  way `make run` prepares it, and the answer must match the JSON shown below it.
* Command line: `stockrelay solve ... --out policy.json` prints the lines shown, and policy.json
  and `result.recommend(...)` hold the values shown.
* Policy store: every `stockrelay` command of the example, in order, on a fresh database.

Elisions (`...`) skip lines or list items; run times, timestamps and request ids are not
compared. A rounded number must be the actual one rounded as shown; a number printed in full
(15 or more significant digits, as the API sends it) must agree to 1e-6 relative.
"""

from __future__ import annotations

import ast
import json
import math
import os
import re
import shlex
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx2
import pytest

from solver import NetworkSpec, solve_network
from tests.e2e.live import (
    DEMO,
    ROOT,
    Live,
    api_key,
    environment,
    migrate,
    wait_until_solved,
)

README = ROOT / "README.md"
MAKE_RUN_BASE = "http://127.0.0.1:8000"
COMMAND_DEADLINE = 60.0
FULL_PRECISION_DIGITS = 15
_ISO_TIMESTAMP = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}")
_UNCOMPARED_KEYS = {"request_id", "seconds"}
# A converged solve's Bellman residual and error bound are rounding noise: their digits change
# with the BLAS and numpy builds the registry serves. Shown, they give an order of magnitude that
# the actual value may not exceed by more than ten times.
_ROUNDING_KEYS = {"residual", "error_bound"}
# Run times printed by the CLI: `seconds     0.011`, `... attempts 1  0.014 s`; and the rounding
# noise of a converged solve: `residual    3.86e-10   bound on error 1.29e-07`.
_TIMINGS = [
    (re.compile(r"^(seconds\s+)\S+$"), r"\1<time>"),
    (re.compile(r"\d+\.\d+ s$"), "<time> s"),
    (re.compile(r"^(residual\s+)\S+e-\d+(\s+bound on error )\S+e-\d+"), r"\1<noise>\2<noise>"),
    (re.compile(r'("residual": )[-\d.e]+e-\d+'), r"\1<noise>"),
]


# -- reading the README ------------------------------------------------------------------------


@dataclass(frozen=True)
class Block:
    section: str
    language: str
    text: str


def readme_blocks() -> list[Block]:
    """Fenced code blocks with the `## ` section they are in."""
    blocks: list[Block] = []
    section, language = "", None
    lines: list[str] = []
    for line in README.read_text(encoding="utf-8").splitlines():
        if language is None:
            if line.startswith("## "):
                section = line[3:].strip()
            elif line.startswith("```"):
                language, lines = line[3:].strip(), []
        elif line.startswith("```"):
            blocks.append(Block(section, language, "\n".join(lines)))
            language = None
        else:
            lines.append(line)
    return blocks


def section_blocks(section: str) -> list[Block]:
    found = [block for block in readme_blocks() if block.section == section]
    assert found, f"README has no code in a section `## {section}`"
    return found


@dataclass(frozen=True)
class Command:
    line: str
    argv: list[str]
    expected: list[str]


def console_commands(block: Block) -> list[Command]:
    """Each `$ ` line of a console block with the output lines that follow it."""
    commands: list[Command] = []
    for line in block.text.splitlines():
        if line.startswith("$ "):
            commands.append(Command(line, shlex.split(line[2:], comments=True), []))
        else:
            assert commands, f"output before any command in:\n{block.text}"
            commands[-1].expected.append(line)
    return commands


class Shown(float):
    """A number as the README prints it."""

    text: str

    def __new__(cls, text: str) -> Shown:
        shown = super().__new__(cls, text)
        shown.text = text
        return shown

    @property
    def tolerance(self) -> float:
        """Half a unit in the last digit shown; 1e-6 relative for a number shown in full."""
        mantissa, _, exponent = self.text.lower().partition("e")
        if len(mantissa.lstrip("-0.").replace(".", "")) >= FULL_PRECISION_DIGITS:
            return 1e-6 * abs(self)
        decimals = len(mantissa.partition(".")[2])
        return 0.5 * 10.0 ** (int(exponent or 0) - decimals) * (1 + 1e-9)


# An object shown with `...` as its last member may have more members than it shows.
_MORE = "..."


def parse_shown_json(text: str) -> Any:
    """JSON whose lists and objects may end in `...` (elided items or members); numbers become
    Shown."""
    text = re.sub(r",\s*\.\.\.\s*(?=\])", "", text)
    text = re.sub(r",\s*\.\.\.\s*(?=\})", f', "{_MORE}": null', text)
    return json.loads(text, parse_float=Shown)


# -- comparing ---------------------------------------------------------------------------------


def assert_number_close(actual: Any, shown: Shown, where: str) -> None:
    assert isinstance(actual, int | float) and not isinstance(actual, bool), (where, actual)
    assert math.isclose(actual, shown, rel_tol=0, abs_tol=shown.tolerance), (
        f"{where}: README shows {shown.text}, got {actual!r}"
    )


def assert_matches_shown(actual: Any, shown: Any, where: str = "") -> None:
    """`actual` has exactly the keys shown (at least, where the README elides members), the
    values shown (lists shown may be elided)."""
    if isinstance(shown, dict):
        assert isinstance(actual, dict), (where, actual)
        if _MORE in shown:
            missing = sorted(set(shown) - set(actual) - {_MORE})
            assert not missing, f"{where}: no {missing} in {sorted(actual)}"
        else:
            assert sorted(actual) == sorted(shown), f"{where}: keys {sorted(actual)}"
        for key, value in shown.items():
            if key in _ROUNDING_KEYS and isinstance(value, Shown):
                noise = actual[key]
                assert isinstance(noise, float) and 0 <= noise <= 10 * value, (where, key, noise)
            elif key not in _UNCOMPARED_KEYS and key != _MORE:
                assert_matches_shown(actual[key], value, f"{where}/{key}")
    elif isinstance(shown, list):
        assert isinstance(actual, list) and len(actual) >= len(shown), (where, actual)
        for index, value in enumerate(shown):
            assert_matches_shown(actual[index], value, f"{where}/{index}")
    elif isinstance(shown, str) and _ISO_TIMESTAMP.match(shown):
        assert isinstance(actual, str) and _ISO_TIMESTAMP.match(actual), (where, actual)
    elif isinstance(shown, Shown):
        assert_number_close(actual, shown, where)
    else:
        assert actual == shown and type(actual) is type(shown), f"{where}: {actual!r} != {shown!r}"


def _mask_timings(line: str) -> str:
    for pattern, replacement in _TIMINGS:
        line = pattern.sub(replacement, line.rstrip())
    return line


def assert_output_matches(actual: str, command: Command) -> None:
    """Printed lines equal the README's; a line `...` stands for any number of lines."""
    got = [_mask_timings(line) for line in actual.splitlines()]
    chunks: list[list[str]] = [[]]
    for line in command.expected:
        if line.strip() == "...":
            chunks.append([])
        else:
            chunks[-1].append(_mask_timings(line))
    message = f"`{command.line}` printed:\n{actual}"
    if len(chunks) == 1:
        assert got == chunks[0], message
        return
    first, *middle, last = chunks
    assert got[: len(first)] == first, message
    assert got[len(got) - len(last) :] == last, message
    position = len(first)
    for chunk in middle:
        while got[position : position + len(chunk)] != chunk:
            position += 1
            assert position < len(got) - len(last), message
        position += len(chunk)


# -- running -----------------------------------------------------------------------------------


def readme_workdir(tmp_path: Path) -> Path:
    """A folder in which the README's relative paths (.venv/bin/stockrelay, service/data/...)
    resolve as in a checkout, and files the examples write land in tmp_path."""
    workdir = tmp_path / "checkout"
    workdir.mkdir()
    (workdir / ".venv").symlink_to(Path(sys.prefix))
    (workdir / "service").symlink_to(ROOT / "service")
    return workdir


def run_stockrelay(command: Command, workdir: Path) -> str:
    assert command.argv[0] == ".venv/bin/stockrelay", command.line
    env = {k: v for k, v in os.environ.items() if not k.startswith("STOCKRELAY_")}
    completed = subprocess.run(
        command.argv,
        cwd=workdir,
        env=env,
        stdin=subprocess.DEVNULL,
        capture_output=True,
        text=True,
        timeout=COMMAND_DEADLINE,
    )
    assert (completed.returncode, completed.stderr) == (0, ""), command.line
    return completed.stdout


def curl_request(command: Command, base: str) -> tuple[str, str, dict[str, str], str | None]:
    """(method, url, headers, body) of a README curl command, aimed at `base` instead of the
    address `make run` serves on."""
    argv = command.argv
    assert argv[0] == "curl", command.line
    method, url, headers, body = "GET", "", {}, None
    args = iter(argv[1:])
    for arg in args:
        if arg == "-s":
            continue
        if arg == "-X":
            method = next(args)
        elif arg == "-H":
            name, _, value = next(args).partition(":")
            headers[name.strip()] = value.strip()
        elif arg == "-d":
            body = next(args)
        elif arg == "--data-binary":
            source = next(args)
            assert source.startswith("@"), command.line
            body = (ROOT / source[1:]).read_text(encoding="utf-8")
        elif arg.startswith("http"):
            url = arg
        else:
            pytest.fail(f"the README's curl uses {arg!r}, which this test does not know")
    assert url.startswith(MAKE_RUN_BASE + "/"), f"make run serves on {MAKE_RUN_BASE}: {url}"
    return method, base + url[len(MAKE_RUN_BASE) :], headers, body


def make_run_database(tmp_path: Path) -> str:
    """A SQLite database prepared as `make run` prepares it: migrated, with the demo network
    imported for both criteria. Returns its URL."""
    url = f"sqlite:///{tmp_path / 'stockrelay.db'}"
    migrate(url)
    subprocess.run(
        [sys.executable, "-m", "service.cli", "networks", "import", str(DEMO),
         "--criteria", "discounted,average", "--skip-unchanged"],
        cwd=ROOT, env=environment(url), check=True, capture_output=True, timeout=COMMAND_DEADLINE,
    )  # fmt: skip
    return url


# -- tests -------------------------------------------------------------------------------------


def test_http_api_example_answers_as_shown(tmp_path: Path, live: Live) -> None:
    blocks = section_blocks("HTTP API")
    [curl] = [c for b in blocks if b.language == "console" for c in console_commands(b)]
    answer, problem = (parse_shown_json(b.text) for b in blocks if b.language == "json")
    assert curl.expected == []

    # As `make run` prepares it: the database, a worker, the API.
    url = make_run_database(tmp_path)
    base = live.api(url)
    live.worker(url)
    method, target, headers, body = curl_request(curl, base)
    # The README's curl takes the key `make run` prints from $STOCKRELAY_KEY.
    key = api_key(url)
    headers = {name: value.replace("$STOCKRELAY_KEY", key) for name, value in headers.items()}
    with httpx2.Client(base_url=base, timeout=10, headers=headers) as client:
        wait_until_solved(live, client, answer["network_id"], ["discounted", "average"])
        response = client.request(method, target, headers=headers, content=body)
        assert response.status_code == 200, response.text
        assert_matches_shown(response.json(), answer)

        # The error example answers the same request with 15 kits at Riverside (capacity 14).
        assert body is not None
        wrong = json.loads(body)
        wrong["stock"]["riverside"] = 15
        response = client.request(method, target, headers=headers, json=wrong)
    assert response.status_code == problem["status"] == 422, response.text
    assert response.headers["content-type"] == "application/problem+json"
    assert_matches_shown(response.json(), problem)


def test_calibration_example_answers_as_shown(tmp_path: Path, live: Live) -> None:
    blocks = section_blocks("Calibration from sales history")
    [console] = [b for b in blocks if b.language == "console"]
    commands = console_commands(console)
    answers = [parse_shown_json(b.text) for b in blocks if b.language == "json"]
    assert len(commands) == len(answers) >= 3

    url = make_run_database(tmp_path)
    base = live.api(url)
    key = api_key(url)
    with httpx2.Client(base_url=base, timeout=30) as client:
        for command, answer in zip(commands, answers, strict=True):
            assert command.expected == []
            method, target, headers, body = curl_request(command, base)
            headers = {k: v.replace("$STOCKRELAY_KEY", key) for k, v in headers.items()}
            response = client.request(method, target, headers=headers, content=body)
            assert response.status_code in (200, 201), (command.line, response.text)
            assert_matches_shown(response.json(), answer, command.line)


def test_simulation_example_prints_what_is_shown(tmp_path: Path) -> None:
    [block] = [b for b in section_blocks("Simulations and what-if") if b.language == "console"]
    [simulate] = console_commands(block)
    assert_output_matches(run_stockrelay(simulate, readme_workdir(tmp_path)), simulate)


def test_command_line_example_prints_and_writes_what_is_shown(tmp_path: Path) -> None:
    blocks = section_blocks("Command line")
    [solve] = [c for b in blocks if b.language == "console" for c in console_commands(b)]
    [document] = [parse_shown_json(b.text) for b in blocks if b.language == "json"]
    [python] = [b.text for b in blocks if b.language == "python"]
    workdir = readme_workdir(tmp_path)

    assert_output_matches(run_stockrelay(solve, workdir), solve)

    out = solve.argv[solve.argv.index("--out") + 1]
    written = json.loads((workdir / out).read_text())
    assert_matches_shown(written, document)

    first, *rest = python.splitlines()
    assert first.startswith(">>> ")
    result = solve_network(NetworkSpec.model_validate_json(DEMO.read_text()))
    actual = eval(first[4:], {"result": result})
    shown = " ".join(line.strip() for line in rest)
    name, fields = re.fullmatch(r"(\w+)\((.*)\)", shown).groups()  # type: ignore[union-attr]
    assert name == type(actual).__name__
    pairs = re.findall(r"(\w+)=(\([^()]*\)|[^,()]+)", fields)
    assert len(pairs) >= 7, shown
    for field, text in pairs:
        if text == "(...)":
            continue
        value = getattr(actual, field)
        if isinstance(value, tuple):
            assert value == ast.literal_eval(text), field
        else:
            assert_number_close(value, Shown(text), field)


def test_policy_store_example_runs_as_shown(tmp_path: Path) -> None:
    [block] = [
        b for b in section_blocks("Policy store and solve workers") if b.language == "console"
    ]
    workdir = readme_workdir(tmp_path)
    ran = 0
    for command in console_commands(block):
        if command.argv[0] == "export":
            # Left unset: the default SQLite database in ./var of the working folder.
            assert command.argv[1].startswith("STOCKRELAY_DATABASE_URL="), command.line
            continue
        assert_output_matches(run_stockrelay(command, workdir), command)
        ran += 1
    assert ran >= 5
    assert (workdir / "var" / "stockrelay.db").exists()
    exported = workdir / "drill-kits.json"
    assert NetworkSpec.model_validate_json(exported.read_text()) == NetworkSpec.model_validate_json(
        DEMO.read_text()
    )
