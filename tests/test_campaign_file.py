"""Campaign files: checked with the rig-file wording (file, key path, reason; exit 2,
nothing run), expanded into cases whose draws and seeds depend only on the campaign
seed and each case's identity, and each case run with the composition of `plantrig run`.
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from plantrig._campaign_case import run_case
from plantrig._campaign_cli import add_parser
from plantrig.cli import main
from plantrig.sim import RigFileError, apply_overrides
from plantrig.sim.config._campaign_file import Draw, expand, load_campaign

ROOT = Path(__file__).resolve().parents[1]
REHEARSALS = ROOT / "configs" / "rehearsals"
GUARDED = REHEARSALS / "conveyor_guarded.toml"
LINK_LOST = REHEARSALS / "link_lost.toml"
STUCK = REHEARSALS / "belt_sensor_stuck.toml"
TANK = ROOT / "configs" / "tank.toml"

GOOD = f"""
[campaign]
name = "spread"
seed = 2026
draws = 3

[[rigs]]
file = "{GUARDED}"
scenarios = ["{LINK_LOST}", "{STUCK}"]
[rigs.grid]
"controller.loops[0].kp" = [50.0, 60.0]
[rigs.draw]
"plant.A[2][2]" = {{ dist = "uniform", spread_pct = 20 }}
"scenario:steps[0].at" = {{ dist = "choice", values = [0.8, 1.0] }}
"""


def write(tmp_path: Path, text: str, name: str = "campaign.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def campaign_command(argv: list[str]) -> int:
    """`plantrig campaign ...` through its own parser (the same one cli.py registers)."""
    parser = argparse.ArgumentParser(prog="plantrig")
    add_parser(parser.add_subparsers())
    args = parser.parse_args(["campaign", *argv])
    return int(args.func(args))


def test_expansion_counts_and_keys(tmp_path: Path) -> None:
    cases = expand(load_campaign(write(tmp_path, GOOD)))
    assert len(cases) == 2 * 3 * 2        # grid points x draws x scenarios
    assert len({c.case_id for c in cases}) == len(cases)
    assert [c.index for c in cases] == list(range(len(cases)))
    nominal = -20.75                      # plant.A[2][2] in conveyor_guarded.toml
    for case in cases:
        values = dict(case.values)
        assert 0.8 * nominal >= values["plant.A[2][2]"] >= 1.2 * nominal
        assert values["scenario:steps[0].at"] in (0.8, 1.0)
        assert f"rig.seed={case.seed}" in case.rig_set
        assert case.scenario_set == (f"steps[0].at={values['scenario:steps[0].at']!r}",)
    # a variation is the same plant for both scenarios; their seeds differ
    first, second = cases[0], cases[1]
    assert first.variation == second.variation and first.values == second.values
    assert {first.scenario, second.scenario} == {"link_lost", "belt_sensor_stuck"}
    assert first.seed != second.seed


def test_cases_depend_on_identity_not_order(tmp_path: Path) -> None:
    base = expand(load_campaign(write(tmp_path, GOOD)))
    assert base == expand(load_campaign(write(tmp_path, GOOD, "again.toml")))
    # another rig entry before this one changes the case numbers, nothing else
    extra = GOOD.replace("[[rigs]]", f'[[rigs]]\nfile = "{TANK}"\ndraws = 1\n'
                                     'set = ["rig.duration=1.0"]\n\n[[rigs]]', 1)
    moved = expand(load_campaign(write(tmp_path, extra, "extra.toml")))
    assert len(moved) == len(base) + 1
    strip = [(c.case_id, c.seed, c.values, c.rig_set) for c in moved[1:]]
    assert strip == [(c.case_id, c.seed, c.values, c.rig_set) for c in base]
    # another campaign seed: other draws and other seeds
    reseeded = expand(load_campaign(write(tmp_path, GOOD.replace("2026", "2027"), "b.toml")))
    assert all(a.seed != b.seed and a.case_id != b.case_id
               for a, b in zip(base, reseeded, strict=True))
    assert [dict(a.values)["plant.A[2][2]"] for a in base] != \
        [dict(b.values)["plant.A[2][2]"] for b in reseeded]


def test_draws_follow_their_distributions() -> None:
    """Sample means against scipy.stats' exact means (4000 draws, within 4 standard
    errors): uniform, normal and a truncated normal cut asymmetrically."""
    rng = np.random.default_rng(1)
    checks = [
        (Draw("k", "uniform", low=2.0, high=5.0), stats.uniform(2.0, 3.0)),
        (Draw("k", "normal", mean=1.0, sd=0.2), stats.norm(1.0, 0.2)),
        (Draw("k", "truncnormal", mean=1.0, sd=0.5, low=0.8, high=2.0),
         stats.truncnorm((0.8 - 1.0) / 0.5, (2.0 - 1.0) / 0.5, loc=1.0, scale=0.5)),
    ]
    for draw, reference in checks:
        samples = np.array([draw.sample(rng) for _ in range(4000)])
        assert abs(samples.mean() - reference.mean()) < 4 * reference.std() / math.sqrt(4000)
        assert samples.min() >= reference.support()[0] and samples.max() <= reference.support()[1]
    choice = Draw("k", "choice", values=("a", "b", "c"))
    picked = [choice.sample(rng) for _ in range(3000)]
    assert {picked.count(v) for v in "abc"} <= set(range(850, 1151))   # 1000 +- ~5 sigma


BAD = [
    ("not toml", "[campaign\n", "", "not valid TOML"),
    ("no campaign table", f'[[rigs]]\nfile = "{GUARDED}"\n', "campaign", "missing table"),
    ("unknown key", f'[campaign]\nseeed = 1\n[[rigs]]\nfile = "{GUARDED}"\n', "campaign.seeed",
     "unknown key; did you mean 'seed'?"),
    ("keep", f'[campaign]\nkeep = "some"\n[[rigs]]\nfile = "{GUARDED}"\n', "campaign.keep",
     "expected one of nothing, failing, all, found string 'some'"),
    ("draws zero", f'[campaign]\ndraws = 0\n[[rigs]]\nfile = "{GUARDED}"\n', "campaign.draws",
     "expected a whole number >= 1, found 0"),
    ("seed type", f'[campaign]\nseed = "x"\n[[rigs]]\nfile = "{GUARDED}"\n', "campaign.seed",
     "expected a whole number, found string 'x'"),
    ("no rigs", "[campaign]\n", "rigs", "missing (expected at least one [[rigs]]"),
    ("no rig file", '[campaign]\n[[rigs]]\nfile = "nowhere.toml"\n', "rigs[0].file",
     "no such rig file"),
    ("grid typo", f'[campaign]\n[[rigs]]\nfile = "{TANK}"\n[rigs.grid]\n'
                  '"plant.params.arae" = [0.1]\n', 'rigs[0].grid."plant.params.arae"',
     "no key 'arae' in plant.params (plant.params.arae does not exist); did you mean 'area'?"),
    ("draw typo", f'[campaign]\n[[rigs]]\nfile = "{TANK}"\n[rigs.draw]\n'
                  '"plant.params.arae" = { dist = "uniform", spread_pct = 20 }\n',
     'rigs[0].draw."plant.params.arae"',
     "no key 'arae' in plant.params (plant.params.arae does not exist); did you mean 'area'?"),
    ("grid empty", f'[campaign]\n[[rigs]]\nfile = "{TANK}"\n[rigs.grid]\n'
                   '"plant.params.area" = []\n', 'rigs[0].grid."plant.params.area"',
     "expected a non-empty list of values, found a list of 0"),
    ("dist typo", f'[campaign]\n[[rigs]]\nfile = "{TANK}"\n[rigs.draw]\n'
                  '"plant.params.area" = { dist = "uniforn", low = 1, high = 2 }\n',
     'rigs[0].draw."plant.params.area".dist',
     "expected one of uniform, normal, truncnormal, choice, found string 'uniforn'; did you mean "
     "'uniform'?"),
    ("uniform without bounds", f'[campaign]\n[[rigs]]\nfile = "{TANK}"\n[rigs.draw]\n'
                               '"plant.params.area" = { dist = "uniform", low = 1 }\n',
     'rigs[0].draw."plant.params.area".high', "missing (expected a number, or spread_pct"),
    ("percent of a name", f'[campaign]\n[[rigs]]\nfile = "{TANK}"\n[rigs.draw]\n'
                          '"rig.name" = { dist = "uniform", spread_pct = 20 }\n',
     'rigs[0].draw."rig.name".spread_pct', "a percentage needs a number at rig.name to take "
                                           "it of, found string 'tank'"),
    ("scenario key without scenarios", f'[campaign]\n[[rigs]]\nfile = "{TANK}"\n[rigs.grid]\n'
                                       '"scenario:steps[0].at" = [1.0]\n',
     'rigs[0].grid."scenario:steps[0].at"', "needs scenarios = [...]"),
    ("scenario key missing", f'[campaign]\n[[rigs]]\nfile = "{GUARDED}"\nscenarios = '
                             f'["{LINK_LOST}"]\n[rigs.grid]\n"scenario:steps[9].at" = [1.0]\n',
     'rigs[0].grid."scenario:steps[9].at"', "no entry [9] in steps"),
    ("rig mistake via set", f'[campaign]\n[[rigs]]\nfile = "{TANK}"\nset = ["rig.tick=-1"]\n',
     "rig.tick", "expected a positive number, found -1"),
    ("campaign verdict", f'[campaign]\n[[verdicts]]\nname = "v"\ncriterion = "rise_tme"\n'
                         f'[[rigs]]\nfile = "{TANK}"\n', "verdicts[0].criterion",
     "did you mean 'rise_time'?"),
]


@pytest.mark.parametrize(("name", "text", "key", "reason"), BAD, ids=[b[0] for b in BAD])
def test_bad_campaign_file(tmp_path: Path, capsys: pytest.CaptureFixture[str], name: str,
                           text: str, key: str, reason: str) -> None:
    path = write(tmp_path, text)
    out = tmp_path / "runs"
    assert campaign_command([str(path), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.startswith("error: ")]
    assert any(reason in line and (f": {key}: " in line if key else True) for line in lines), err
    assert any(str(path) in line or ".toml" in line for line in lines)
    assert "nothing was run" in err
    assert not out.exists()                        # nothing was run, nothing written


def test_grid_typo_reads_like_set(tmp_path: Path) -> None:
    """The campaign's message for a wrong key path is --set's own."""
    with pytest.raises(RigFileError) as set_error:
        apply_overrides({"plant": {"params": {"area": 0.1}}}, ["plant.params.arae=1"], "f")
    text = f'[campaign]\n[[rigs]]\nfile = "{TANK}"\n[rigs.grid]\n"plant.params.arae" = [1]\n'
    with pytest.raises(RigFileError) as campaign_error:
        load_campaign(write(tmp_path, text))
    assert set_error.value.issues[0].message.split(" (override")[0] == \
        campaign_error.value.issues[0].message


def test_case_equals_plantrig_run(tmp_path: Path) -> None:
    """A case's row is what `plantrig run RIG --fast --scenario FILE --set ...` with the
    case's assignments records in its run folder (verdicts bit for bit)."""
    text = (f'[campaign]\nseed = 3\n[[rigs]]\nfile = "{GUARDED}"\nscenarios = ["{LINK_LOST}"]\n'
            '[rigs.draw]\n"plant.A[2][2]" = { dist = "uniform", spread_pct = 20 }\n')
    (case,) = expand(load_campaign(write(tmp_path, text)))
    row = run_case(case)
    assert row["status"] in ("passed", "failed") and row["error"] == ""
    out = tmp_path / "runs"
    argv = ["run", case.rig_file, "--fast", "--scenario", case.scenario_file, "--out", str(out)]
    for assignment in case.rig_set:
        argv += ["--set", assignment]
    assert main(argv) == row["exit_code"]
    (folder,) = out.glob("conveyor_guarded-*")
    summary = json.loads((folder / "summary.json").read_text())
    assert (row["outcome"], row["reason"], row["ticks"]) == \
        (summary["ended"], summary["reason"], summary["ticks_run"])
    assert [(v["name"], v["passed"]) for v in row["verdicts"]] == \
        [(v["name"], v["passed"]) for v in summary["verdicts"]]
    for ours, theirs in zip(row["verdicts"], summary["verdicts"], strict=True):
        assert (ours["measured"] == theirs["measured"]) or (
            theirs["measured"] is None and not math.isfinite(ours["measured"]))


def test_case_that_raises_is_an_error_row(tmp_path: Path) -> None:
    text = (f'[campaign]\n[[rigs]]\nfile = "{TANK}"\nset = ["rig.duration=0.5"]\n'
            '[rigs.grid]\n"rig.tick" = [0.01, -1.0]\n')
    good, bad = (run_case(c) for c in expand(load_campaign(write(tmp_path, text))))
    assert good["status"] == "passed" and good["ticks"] == 50
    assert bad["status"] == "error" and bad["exit_code"] is None
    assert "rig.tick: expected a positive number, found -1.0" in bad["error"]


def test_link_rig_runs_with_its_controller_built_in(tmp_path: Path) -> None:
    text = (f'[campaign]\n[[rigs]]\nfile = "{REHEARSALS / "conveyor_guarded_hil.toml"}"\n'
            f'scenarios = ["{LINK_LOST}"]\n')
    (case,) = expand(load_campaign(write(tmp_path, text)))
    row = run_case(case)
    assert row["error"] == "" and row["outcome"] == "completed", row
    assert row["verdicts"] and row["ticks"] > 0


def test_a_model_module_from_a_run_folder_is_not_imported_by_workers(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # the tank's run folder: its rig.toml names the module copy beside it, which no
    # signature vouches for once it is edited; the campaign refuses before any worker
    assert main(["run", str(TANK), "--fast", "--duration", "1", "--out",
                 str(tmp_path / "runs")]) == 0
    [folder] = [p for p in (tmp_path / "runs").iterdir() if p.is_dir()]
    module = next(folder.glob("*.py"))
    module.write_text(module.read_text() + "\n# edited after the run\n")
    campaign = write(tmp_path, f'[campaign]\nname = "t"\n\n[[rigs]]\nfile = '
                               f'"{folder / "rig.toml"}"\n')
    capsys.readouterr()
    assert campaign_command([str(campaign), "--out", str(tmp_path / "c")]) == 2
    err = capsys.readouterr().err
    assert "came with the run folder" in err and "--trust-model" in err
    assert not (tmp_path / "c").exists()
