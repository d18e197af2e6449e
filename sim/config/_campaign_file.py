"""Campaign files: many rehearsals of one or more rigs, as one checked list of cases.

A test engineer gating a firmware release wants every scenario of a rig judged under
plant tolerances and fault timings, not one hand-picked run. A campaign file names the
rigs, the scenarios to rehearse on each, and the variations: a grid over rig keys and
seeded random draws (uniform, normal, truncated normal, choice). A varied key is a rig
key path exactly as ``plantrig run --set`` takes it (``plant.params.area``,
``plant.A[2][2]``, ``controller.loops[0].kp``); a key written ``scenario:PATH`` is a key
path into each scenario file of that rig (``scenario:steps[0].at``, a fault's time).
Values are applied through the one override mechanism (plantrig.sim.config._overrides), so a
wrong path gets the same message as ``--set``.

Every case is reproducible on its own: its draws and its rig seed are derived with
SHA-256 from the campaign seed and the case's identity (rig file, scenario file, grid
values, draw number), never from the order cases run in.

File format and a worked example: docs/campaigns.md.
"""

from __future__ import annotations

import dataclasses
import hashlib
import itertools
import json
import math
import tomllib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import tomli_w

from plantrig.sim.config._checker import Checker, RigFileError, RigIssue, describe_value, one_of
from plantrig.sim.config._overrides import apply_overrides, load_rig_with_overrides, parse_path
from plantrig.sim.scenario._scenario import build_scenario

TOP_KEYS = {"campaign", "acceptance", "verdicts", "rigs"}
CAMPAIGN_KEYS = {"name", "description", "seed", "draws", "keep"}
ENTRY_KEYS = {"file", "scenarios", "set", "grid", "draw", "draws"}
KEEP = ("nothing", "failing", "all")
SCENARIO_PREFIX = "scenario:"
DIST_KEYS = {
    "uniform": {"low", "high", "spread_pct"},
    "normal": {"mean", "sd", "sd_pct"},
    "truncnormal": {"mean", "sd", "sd_pct", "low", "high", "spread_pct"},
    "choice": {"values"},
}
TRUNCNORMAL_TRIES = 10_000


class CampaignFileError(RigFileError):
    """Every mistake in a campaign file (and the rig and scenario files it names)."""


@dataclass(frozen=True)
class Draw:
    """One randomly drawn key: its distribution, with percentages already resolved
    against the rig's own value."""

    key: str
    dist: str
    low: float = -math.inf
    high: float = math.inf
    mean: float = 0.0
    sd: float = 0.0
    values: tuple[Any, ...] = ()

    def sample(self, rng: np.random.Generator) -> Any:
        if self.dist == "uniform":
            return float(rng.uniform(self.low, self.high))
        if self.dist == "normal":
            return float(rng.normal(self.mean, self.sd))
        if self.dist == "choice":
            return self.values[int(rng.integers(len(self.values)))]
        for _ in range(TRUNCNORMAL_TRIES):   # truncnormal: redraw until inside [low, high]
            value = float(rng.normal(self.mean, self.sd))
            if self.low <= value <= self.high:
                return value
        raise ValueError(f"{self.key}: truncated normal drew nothing inside "
                         f"[{self.low}, {self.high}] in {TRUNCNORMAL_TRIES} tries")


@dataclass(frozen=True)
class RigEntry:
    """One ``[[rigs]]`` table: a rig file, its scenarios and its variations."""

    where: str                       # 'rigs[0]', for messages
    file: Path                       # absolute
    written: str                     # as written in the campaign file (identity)
    name: str                        # the rig's own name
    scenarios: tuple[tuple[Path, str], ...]   # (absolute path, as written); () = rig alone
    fixed: tuple[str, ...]
    grid: tuple[tuple[str, tuple[Any, ...]], ...]
    draws: tuple[Draw, ...]
    n_draws: int


@dataclass(frozen=True)
class Campaign:
    """A checked campaign file."""

    path: Path
    sha256: str
    name: str
    description: str
    seed: int
    keep: str
    acceptance: tuple[str, ...]      # 'acceptance.KEY=VALUE' for every rig
    verdicts: tuple[dict[str, Any], ...]
    entries: tuple[RigEntry, ...]


@dataclass(frozen=True)
class Case:
    """One rehearsal of a campaign: everything a worker needs, and nothing it must share."""

    index: int
    case_id: str
    rig: str
    rig_file: str
    rig_sha256: str
    scenario: str                    # scenario file stem, '' for the rig alone
    scenario_file: str
    scenario_sha256: str
    variation: str                   # 'v000' within its rig entry
    draw: int
    seed: int
    values: tuple[tuple[str, Any], ...]      # the varied keys and their values
    rig_set: tuple[str, ...]         # every rig assignment, in the order applied
    scenario_set: tuple[str, ...]
    verdicts: tuple[dict[str, Any], ...]     # the campaign's own verdicts

    def as_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


def toml_literal(value: Any) -> str:
    """``value`` as a TOML literal for an override (floats exactly, by repr)."""
    return tomli_w.dumps({"v": value})[4:].strip()


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _lookup(doc: Any, key: str) -> Any:
    """The value at a key path in a parsed document, or None."""
    node = doc
    for step in parse_path(key) or []:
        try:
            node = node[step]
        except (KeyError, IndexError, TypeError):
            return None
    return node


def load_campaign(path: str | Path) -> Campaign:
    """Read and check a campaign file and every rig and scenario file it names.

    Raises CampaignFileError with every mistake (file, key path, reason).
    """
    path = Path(path)
    file = str(path)
    try:
        data = path.read_bytes()
        doc = tomllib.loads(data.decode("utf-8"))
    except OSError as exc:
        raise CampaignFileError([RigIssue(file, "", f"cannot read: {exc.strerror or exc}")]) \
            from None
    except UnicodeDecodeError as exc:
        raise CampaignFileError([RigIssue(file, "", f"not UTF-8 text: {exc.reason}")]) from None
    except tomllib.TOMLDecodeError as exc:
        raise CampaignFileError([RigIssue(file, "", f"not valid TOML: {exc}")]) from None
    c = Checker(file)
    c.no_unknown(doc, TOP_KEYS, "")
    head = c.table(doc, "campaign", "", required=True)
    c.no_unknown(head, CAMPAIGN_KEYS, "campaign")
    name = c.take(head, "name", "campaign", "str", default=path.stem) or path.stem
    description = c.take(head, "description", "campaign", "str", default="") or ""
    seed = c.take(head, "seed", "campaign", "int", default=0,
                  check=lambda v: None if v >= 0 else f"expected a whole number >= 0, found {v}")
    n_draws = c.take(head, "draws", "campaign", "int", default=1, check=_at_least_one)
    keep = c.take(head, "keep", "campaign", "str", default="failing", check=one_of(KEEP))
    acceptance_t = c.table(doc, "acceptance", "", required=False)
    acceptance = tuple(f"acceptance.{k}={toml_literal(v)}" for k, v in acceptance_t.items())
    verdicts = doc.get("verdicts", [])
    if not isinstance(verdicts, list) or not all(isinstance(v, dict) for v in verdicts):
        c.add("verdicts", f"expected an array of tables ([[verdicts]]), found "
                          f"{describe_value(verdicts)}")
        verdicts = []
    rigs = doc.get("rigs")
    if rigs is None:
        c.add("rigs", "missing (expected at least one [[rigs]] table with a rig file)")
        rigs = []
    elif not isinstance(rigs, list) or not rigs or not all(isinstance(r, dict) for r in rigs):
        c.add("rigs", f"expected an array of tables ([[rigs]]), found {describe_value(rigs)}")
        rigs = []
    entries = [_entry(c, r, f"rigs[{i}]", path, acceptance, tuple(verdicts), n_draws or 1)
               for i, r in enumerate(rigs)]
    if c.issues:
        raise CampaignFileError(c.issues)
    return Campaign(path.resolve(), hashlib.sha256(data).hexdigest(), name, description,
                    int(seed or 0), keep or "failing", acceptance, tuple(verdicts),
                    tuple(e for e in entries if e is not None))


def _at_least_one(value: Any) -> str | None:
    return None if value >= 1 else f"expected a whole number >= 1, found {value}"


def _entry(c: Checker, t: dict[str, Any], where: str, campaign: Path,
           acceptance: tuple[str, ...], verdicts: tuple[dict[str, Any], ...],
           default_draws: int) -> RigEntry | None:
    """Check one [[rigs]] table, loading its rig and scenarios; None after a mistake."""
    before = len(c.issues)
    c.no_unknown(t, ENTRY_KEYS, where)
    written = c.take(t, "file", where, "str")
    scenario_files = c.take(t, "scenarios", where, "list", default=[]) or []
    fixed = c.take(t, "set", where, "list", default=[]) or []
    n_draws = c.take(t, "draws", where, "int", default=default_draws, check=_at_least_one)
    grid_t = c.table(t, "grid", where, required=False)
    draw_t = c.table(t, "draw", where, required=False)
    for j, item in enumerate(fixed):
        if not isinstance(item, str):
            c.add(f"{where}.set[{j}]", f"expected a string KEY=VALUE, found {describe_value(item)}")
    for j, item in enumerate(scenario_files):
        if not isinstance(item, str):
            c.add(f"{where}.scenarios[{j}]", f"expected a file name, found {describe_value(item)}")
    if written is None or len(c.issues) > before:
        return None
    rig_path = (campaign.parent / written).resolve()
    if not rig_path.is_file():
        c.add(f"{where}.file", f"no such rig file {rig_path}")
        return None
    try:
        rig = load_rig_with_overrides(rig_path, [*fixed, *acceptance])
    except RigFileError as exc:
        c.issues.extend(exc.issues)
        c.add(f"{where}.file", f"the rig {written} has {len(exc.issues)} mistake(s) (above)")
        return None
    rig_doc = tomllib.loads(rig.text)
    scenarios: list[tuple[Path, str, dict[str, Any]]] = []
    for j, item in enumerate(scenario_files):
        s_path = (campaign.parent / item).resolve()
        try:
            s_text = s_path.read_text(encoding="utf-8")
            s_doc = tomllib.loads(s_text)
        except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
            c.add(f"{where}.scenarios[{j}]", f"cannot read scenario {s_path}: "
                                             f"{getattr(exc, 'strerror', None) or exc}")
            continue
        try:
            build_scenario(with_verdicts(s_doc, verdicts), s_path, rig, s_text)
        except RigFileError as exc:
            c.issues.extend(exc.issues)
            continue
        scenarios.append((s_path, item, s_doc))
    if verdicts and not scenario_files:
        try:
            build_scenario(with_verdicts({"scenario": {"name": "campaign"}}, verdicts),
                           campaign, rig)
        except RigFileError as exc:
            c.issues.extend(exc.issues)
    grid = []
    for key, values in grid_t.items():
        here = f'{where}.grid."{key}"'
        if not isinstance(values, list) or not values:
            c.add(here, f"expected a non-empty list of values, found {describe_value(values)}")
            continue
        if _key_ok(c, here, key, values[0], rig_doc, scenarios):
            grid.append((key, tuple(values)))
    draws = []
    for key, spec in draw_t.items():
        here = f'{where}.draw."{key}"'
        nominal = _nominal(key, rig_doc, scenarios)
        if nominal is None and not _key_ok(c, here, key, 0.0, rig_doc, scenarios):
            continue     # no such key: say that (with a did-you-mean), not what follows
        draw = _draw(c, here, key, spec, nominal)
        if draw is not None and _key_ok(c, here, key, draw.values[0] if draw.values
                                        else nominal if nominal is not None else 0.0,
                                        rig_doc, scenarios):
            draws.append(draw)
    if len(c.issues) > before:
        return None
    return RigEntry(where, rig_path, written, rig.name,
                    tuple((p, w) for p, w, _ in scenarios), tuple(fixed), tuple(grid),
                    tuple(draws), int(n_draws or 1))


def with_verdicts(doc: dict[str, Any], verdicts: tuple[dict[str, Any], ...]) -> dict[str, Any]:
    """The scenario document with the campaign's own verdicts after its own."""
    if not verdicts:
        return doc
    out = dict(doc)
    own = out.get("verdicts", [])
    out["verdicts"] = [*(own if isinstance(own, list) else [own]), *verdicts]
    return out


def _nominal(key: str, rig_doc: dict[str, Any],
             scenarios: list[tuple[Path, str, dict[str, Any]]]) -> Any:
    if key.startswith(SCENARIO_PREFIX):
        if not scenarios:
            return None
        return _lookup(scenarios[0][2], key[len(SCENARIO_PREFIX):])
    return _lookup(rig_doc, key)


def _key_ok(c: Checker, here: str, key: str, value: Any, rig_doc: dict[str, Any],
            scenarios: list[tuple[Path, str, dict[str, Any]]]) -> bool:
    """Whether ``key`` is a path the override mechanism can set (rig or each scenario)."""
    if key.startswith(SCENARIO_PREFIX):
        targets = [(str(p), d) for p, _, d in scenarios]
        inner = key[len(SCENARIO_PREFIX):]
        if not targets:
            c.add(here, "a scenario: key needs scenarios = [...] in this [[rigs]] table")
            return False
    else:
        targets = [("rig", rig_doc)]
        inner = key
    ok = True
    for file, doc in targets:
        try:
            apply_overrides(doc, [f"{inner}={toml_literal(value)}"], file)
        except RigFileError as exc:
            for issue in exc.issues:
                reason = issue.message.rsplit(" (override ", 1)[0]   # ours, not the user's
                c.add(here, reason + (f" in {file}" if file != "rig" else ""))
            ok = False
    return ok


def _draw(c: Checker, here: str, key: str, spec: Any, nominal: Any) -> Draw | None:
    """One draw table, checked; percentages resolved against ``nominal``."""
    if not isinstance(spec, dict):
        c.add(here, f"expected a table like {{ dist = \"uniform\", spread_pct = 20 }}, "
                    f"found {describe_value(spec)}")
        return None
    dist = c.take(spec, "dist", here, "str", check=one_of(tuple(DIST_KEYS)))
    if dist is None:
        return None
    c.no_unknown(spec, DIST_KEYS[dist] | {"dist"}, here)
    before = len(c.issues)
    nums = {}
    for name in DIST_KEYS[dist] - {"values"}:
        nums[name] = c.take(spec, name, here, "number", default=None)
    if len(c.issues) > before:
        return None
    pct_keys = [k for k in ("spread_pct", "sd_pct") if nums.get(k) is not None]
    if pct_keys:
        if not isinstance(nominal, int | float) or isinstance(nominal, bool):
            c.add(f"{here}.{pct_keys[0]}", f"a percentage needs a number at {key} to take it "
                                            f"of, found {describe_value(nominal)}")
            return None
        if any(nums[k] < 0 for k in pct_keys):
            c.add(f"{here}.{pct_keys[0]}", "expected a percentage >= 0")
            return None
    if dist == "choice":
        values = c.take(spec, "values", here, "list")
        if values is not None and not values:
            c.add(f"{here}.values", "expected a non-empty list of values, found an empty list")
            return None
        return None if values is None else Draw(key, dist, values=tuple(values))
    bounds = _bounds(c, here, dist, nums, nominal)
    spread = _spread(c, here, key, dist, nums, nominal) if bounds is not None else None
    if bounds is None or spread is None:
        return None
    (low, high), (mean, sd) = bounds, spread
    if dist == "uniform":
        return Draw(key, dist, low=low, high=high)
    if dist == "normal":
        return Draw(key, dist, mean=mean, sd=sd)
    if sd == 0 and not low <= mean <= high:
        c.add(f"{here}.mean", f"expected a mean inside [{low}, {high}] when sd is 0")
        return None
    return Draw(key, dist, low=low, high=high, mean=mean, sd=sd)


def _bounds(c: Checker, here: str, dist: str, nums: dict[str, Any],
            nominal: Any) -> tuple[float, float] | None:
    """(low, high) of a uniform or truncated draw, from low/high or spread_pct around
    ``nominal``; (0, 0) for a normal draw; None after recording a mistake."""
    low, high = nums.get("low"), nums.get("high")
    if nums.get("spread_pct") is not None:
        if low is not None or high is not None:
            c.add(f"{here}.spread_pct", "give spread_pct or low and high, not both")
            return None
        a, b = nominal * (1 - nums["spread_pct"] / 100), nominal * (1 + nums["spread_pct"] / 100)
        low, high = min(a, b), max(a, b)
    if dist == "normal":
        return 0.0, 0.0
    if low is None or high is None:
        c.add(f"{here}.{'low' if low is None else 'high'}",
              "missing (expected a number, or spread_pct around the rig's value)")
        return None
    if low > high:
        c.add(f"{here}.high", f"expected high >= low ({low}), found {high}")
        return None
    return float(low), float(high)


def _spread(c: Checker, here: str, key: str, dist: str, nums: dict[str, Any],
            nominal: Any) -> tuple[float, float] | None:
    """(mean, sd) of a normal or truncated draw (the mean defaults to ``nominal``, sd
    may be sd_pct of it); (0, 0) for a uniform draw; None after recording a mistake."""
    if dist == "uniform":
        return 0.0, 0.0
    mean = nominal if nums.get("mean") is None else nums["mean"]
    if not isinstance(mean, int | float) or isinstance(mean, bool):
        c.add(f"{here}.mean", f"missing, and {key} holds {describe_value(mean)} "
                              "to take it from (expected a number)")
        return None
    sd = nums.get("sd")
    if nums.get("sd_pct") is not None:
        if sd is not None:
            c.add(f"{here}.sd_pct", "give sd or sd_pct, not both")
            return None
        sd = abs(nominal) * nums["sd_pct"] / 100
    if sd is None or sd < 0:
        c.add(f"{here}.sd", "missing (expected a number >= 0, or sd_pct)" if sd is None
              else f"expected a number >= 0, found {sd}")
        return None
    return float(mean), float(sd)


def _hash_int(*parts: Any, nbytes: int = 8) -> int:
    text = json.dumps([str(p) if isinstance(p, Path) else p for p in parts])
    return int.from_bytes(hashlib.sha256(text.encode()).digest()[:nbytes], "big")


def expand(campaign: Campaign) -> list[Case]:
    """Every case of ``campaign``, in a fixed order (rig entry, grid point, draw,
    scenario). Draws and seeds depend only on the campaign seed and each case's
    identity, never on its position."""
    cases: list[Case] = []
    for entry in campaign.entries:
        keys = [k for k, _ in entry.grid]
        points = list(itertools.product(*(v for _, v in entry.grid))) or [()]
        rig_sha = _sha256(entry.file)
        scenario_files: list[tuple[Path | None, str, str]] = [
            (p, w, _sha256(p)) for p, w in entry.scenarios] or [(None, "", "")]
        variation = 0
        for point in points:
            grid_values = list(zip(keys, point, strict=True))
            for draw in range(entry.n_draws):
                identity = [campaign.seed, entry.written, grid_values, draw]
                values = list(grid_values)
                for spec in entry.draws:
                    rng = np.random.default_rng(_hash_int(*identity, spec.key, nbytes=16))
                    values.append((spec.key, spec.sample(rng)))
                for s_path, s_written, s_sha in scenario_files:
                    case_identity = [*identity, s_written,
                                     [[k, toml_literal(v)] for k, v in values]]
                    seed = _hash_int("seed", *case_identity, nbytes=4) & 0x7FFF_FFFF
                    case_id = f"{_hash_int('id', *case_identity, nbytes=6):012x}"
                    rig_set = [*entry.fixed, *campaign.acceptance, f"rig.seed={seed}",
                               *(f"{k}={toml_literal(v)}" for k, v in values
                                 if not k.startswith(SCENARIO_PREFIX))]
                    scenario_set = [f"{k[len(SCENARIO_PREFIX):]}={toml_literal(v)}"
                                    for k, v in values if k.startswith(SCENARIO_PREFIX)]
                    cases.append(Case(
                        len(cases), case_id, entry.name, str(entry.file), rig_sha,
                        s_path.stem if s_path else "", str(s_path) if s_path else "", s_sha,
                        f"v{variation:03d}", draw, seed, tuple(values), tuple(rig_set),
                        tuple(scenario_set), campaign.verdicts))
                variation += 1
    return cases


def variation_keys(cases: Sequence[Case]) -> list[str]:
    """Every varied key, in order of first appearance."""
    seen: dict[str, None] = {}
    for case in cases:
        for key, _ in case.values:
            seen.setdefault(key, None)
    return list(seen)

