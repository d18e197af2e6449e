"""The console and the docs speak with one voice: one caution text, shown once per
command on stderr, and every quoted caution in the docs is that same text."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest
from hil_helpers import CLOSING

from plantrig import CAUTION
from plantrig.io import end_lines
from plantrig.io._refcontroller import COUNT_WORDS, LINK_COUNTS, ControllerCounts
from plantrig.sim.config._link_settings import LINK_KINDS

REPO = Path(__file__).resolve().parents[1]
CONVEYOR = REPO / "configs" / "conveyor.toml"
TANK = REPO / "configs" / "tank.toml"


def quoted_cautions(text: str) -> list[str]:
    """Every blockquote of a markdown text that speaks of safety, joined into one line."""
    blocks = re.findall(r"(?:^>.*\n?)+", text, flags=re.MULTILINE)
    joined = [" ".join(line[1:].strip() for line in b.splitlines()) for b in blocks]
    return [b.strip() for b in joined if "safety function" in b]


def test_every_caution_in_the_docs_is_the_one_caution() -> None:
    docs = [REPO / "README.md", REPO / "firmware" / "README.md",
            *sorted((REPO / "docs").glob("*.md"))]
    found = {p.name: quoted_cautions(p.read_text(encoding="utf-8")) for p in docs}
    assert found["README.md"] == [CAUTION]
    for name, cautions in found.items():
        assert all(c == CAUTION for c in cautions), name


def test_run_shows_the_caution_once_on_stderr(tmp_path: Path) -> None:
    proc = subprocess.run([sys.executable, "-m", "plantrig", "run", str(CONVEYOR), "--out",
                           str(tmp_path)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr.count("not a safety function") == 1 and CAUTION in proc.stderr
    assert "safety function" not in proc.stdout


def test_json_alone_on_stdout(tmp_path: Path) -> None:
    proc = subprocess.run([sys.executable, "-m", "plantrig", "run", str(CONVEYOR), "--out",
                           str(tmp_path), "--json"], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads(proc.stdout)             # nothing else on stdout
    assert doc["ended"] == "completed" and doc["exit_code"] == 0
    assert Path(doc["folder"]).is_dir() and "outcome: COMPLETED" in proc.stderr


def test_a_long_fast_run_shows_its_progress(tmp_path: Path) -> None:
    # a few seconds of fast ticks: the progress appears on stderr after two seconds (the
    # tank's ODE ticks in Python: 200k of them take about 5 s here, where 600k of the
    # conveyor's plain ticks in C take under 2 s)
    proc = subprocess.run([sys.executable, "-m", "plantrig", "run", str(TANK), "--out",
                           str(tmp_path), "--duration", "2000"], capture_output=True,
                          text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert "fast run:" in proc.stderr and "tick" in proc.stderr
    assert "fast run:" not in proc.stdout


def test_docs_and_code_cite_only_files_the_repository_holds() -> None:
    cited = re.compile(r"(?<![\w/.-])((?:[\w-]+/)*[\w-]+\.md)\b")
    sources = [*REPO.glob("*.md"), *REPO.glob("docs/*.md"), *REPO.glob("firmware/*.md"),
               *REPO.glob("sim/**/*.py"), *REPO.glob("io/*.py"), *REPO.glob("gui/*.py"),
               *REPO.glob("app/*.py"), *REPO.glob("bench/*.py"), *REPO.glob("tests/*.py")]
    missing = []
    for path in sources:
        for name in cited.findall(path.read_text(encoding="utf-8")):
            if not any((base / name).is_file() for base in (path.parent, REPO, REPO / "docs")):
                missing.append(f"{path.relative_to(REPO)}: {name}")
    assert not missing, missing


def test_every_command_has_a_description_and_its_exit_codes() -> None:
    from plantrig.cli import build_parser
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    lacking = []
    for name, command in sub.choices.items():  # type: ignore[attr-defined]
        text = command.format_help()
        if not command.description or "exit code" not in text.lower():
            lacking.append(name)
    assert not lacking, f"no description or exit codes in --help of: {lacking}"


def test_check_lists_safety_and_checks_a_scenario_without_running(tmp_path: Path) -> None:
    rehearsals = REPO / "configs" / "rehearsals"
    rig, scenario = rehearsals / "conveyor_guarded.toml", rehearsals / "link_lost.toml"
    ok = subprocess.run([sys.executable, "-m", "plantrig", "check", str(rig), "--scenario",
                         str(scenario)], capture_output=True, text=True, timeout=60)
    assert ok.returncode == 0, ok.stderr
    assert "limit: belt_fast on x:belt_speed, trips above 1.1 m/s" in ok.stdout
    assert "interlock: link_watchdog on link_lost -> safe_inputs" in ok.stdout
    assert f"scenario: link_lost: 4 step(s), 4 verdict(s); {scenario}: ok" in ok.stdout
    mixed_up = subprocess.run([sys.executable, "-m", "plantrig", "check", str(scenario)],
                              capture_output=True, text=True, timeout=60)
    assert mixed_up.returncode == 2 and "is a scenario file, not a rig file" in mixed_up.stderr
    campaign = REPO / "configs" / "campaigns" / "release_spread.toml"
    for command in ("check", "run"):     # one line that says what it is, not a dozen
        given = subprocess.run([sys.executable, "-m", "plantrig", command, str(campaign)],
                               capture_output=True, text=True, timeout=60)
        assert given.returncode == 2, given.stderr
        assert given.stderr.strip() == (f"error: {campaign} is a campaign file, not a rig "
                                        f"file; run it with: plantrig campaign {campaign}")
    bad = tmp_path / "bad.toml"
    bad.write_text(scenario.read_text().replace('reset = "link_watchdog"', 'reset = "nope"'))
    refused = subprocess.run([sys.executable, "-m", "plantrig", "check", str(rig),
                              "--scenario", str(bad)], capture_output=True, text=True,
                             timeout=60)
    assert refused.returncode == 2 and "reset" in refused.stderr
    assert "Traceback" not in refused.stderr


def test_the_demo_shows_the_caution_once_for_both_of_its_processes(tmp_path: Path) -> None:
    proc = subprocess.run([sys.executable, "-m", "plantrig", "demo", "--out", str(tmp_path)],
                          capture_output=True, text=True, timeout=180)
    both = proc.stdout + proc.stderr
    assert both.count("not a safety function") == 1, both
    assert "controller: ready" in proc.stdout      # the controller process did run


@pytest.mark.parametrize("kind", sorted(LINK_KINDS))
def test_the_controllers_closing_lines_have_one_form_for_every_link(kind: str) -> None:
    """Why it ended and 'answered N' first, then the link's own counts in the same
    words, then the rig states: the same two lines whatever the link."""
    counts = ControllerCounts(rx_ok=1501, rig_states=["running/0", "ended/0"])
    lines = end_lines(kind, "the rig closed the link", counts)
    found = CLOSING.fullmatch("\n".join(lines))
    assert found and found["reason"] == "the rig closed the link"
    assert found["answered"] == "1501" and found["states"] == "running/0 ended/0"
    said = [part.rsplit(" ", 1)[0] for part in lines[0].split("; ", 1)[1].split(", ")]
    assert said == [COUNT_WORDS[name] for name in LINK_COUNTS[kind]]
    assert end_lines(kind, "stopped", ControllerCounts())[1] == "controller: rig states none"


@pytest.mark.parametrize("rig", ["conveyor_mqtt.toml", "conveyor_modbus.toml"])
@pytest.mark.parametrize("port", ["abc", "127.0.0.1:99999", "127.0.0.1:", "0"])
def test_a_bad_port_for_a_network_link_runs_nothing(tmp_path: Path, rig: str,
                                                     port: str) -> None:
    # it had ended in a traceback (exit 1), or a whole run faulted on a server that
    # could not listen
    done = subprocess.run([sys.executable, "-m", "plantrig", "run",
                           str(REPO / "configs" / rig), "--port", port, "--out",
                           str(tmp_path / "runs")], capture_output=True, text=True, timeout=60)
    assert done.returncode == 2, done.stderr
    assert f"error: --port {port}: expected host:port or a port number 1..65535" in \
        done.stderr and "Traceback" not in done.stderr
    assert not list((tmp_path / "runs").glob("*/summary.json"))
