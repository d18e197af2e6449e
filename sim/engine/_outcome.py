"""How a run ended: one outcome class with its reason and exit code, and the acceptance
rules that decide whether a run that reached its last tick counts as completed.

A sign-off tool must never say "completed" for a run that did not do what was asked:
a controller that never answered, a link that was lost, a real-time run that skipped
slots, or an interlock that tripped without the test expecting it. The engine counts the
facts; ``judge`` turns them into one result per rule; ``settle`` gives the outcome.

Outcome classes and exit codes (docs/records.md, `plantrig run --help`):

    completed    0  every planned tick ran and every acceptance rule held
    fault        1  link lost, controller silent, real time not held, model error,
                    the record could not be written, the recorder died
    tripped      4  an interlock latched that the rig or scenario did not expect
    stopped      5  the operator (dashboard, command) or a signal (SIGINT, SIGTERM)
    interrupted  6  the rig process died; the record was rebuilt by `plantrig recover`

Exit code 2 is a rig-file or usage mistake (nothing ran) and 3 a completed run whose
scenario verdict failed.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

COMPLETED, FAULT, TRIPPED, STOPPED, INTERRUPTED = (
    "completed", "fault", "tripped", "stopped", "interrupted")
OUTCOMES = (COMPLETED, FAULT, TRIPPED, STOPPED, INTERRUPTED)
EXIT_USAGE, EXIT_VERDICT = 2, 3
EXIT_CODES = {COMPLETED: 0, FAULT: 1, TRIPPED: 4, STOPPED: 5, INTERRUPTED: 6}

EXIT_CODE_HELP = """exit codes:
  0  completed: every planned tick ran and every acceptance rule held
     (and, for a run with a scenario, every verdict passed)
  1  fault: link lost, controller silent, NaN or infinite commands, real time
     not held, model error, run record (or --junit file) not written, recorder
     died
  2  rig file, scenario file or usage mistake: nothing was run
  3  completed, but a scenario verdict failed
  4  tripped: an interlock latched that the rig or scenario did not expect
  5  stopped: by the operator or by a signal (SIGINT, SIGTERM)"""

ACCEPTANCE_KEYS = {"min_answered", "allow_link_loss", "max_late", "allowed_trips"}


@dataclass(frozen=True)
class AcceptanceRules:
    """What a run must show to count as completed (the rig file's [acceptance] table).

    ``min_answered``: share of ticks run that got a fresh command from the controller
    (before rehearsed link faults; a controller on a link only). ``allow_link_loss``: a
    watchdog loss of the real link is acceptable. ``max_late``: share of the ticks run
    that started a whole tick late or were skipped (real time only). ``allowed_trips``:
    interlocks whose trip is part of the test (a scenario adds the ones it expects).
    """

    min_answered: float = 0.75
    allow_link_loss: bool = False
    max_late: float = 0.01
    allowed_trips: tuple[str, ...] = ()


@dataclass(frozen=True)
class RunFacts:
    """What the engine counted during a run, for judging it."""

    ticks_planned: int
    ticks_run: int
    on_link: bool
    answered: int
    link_losses: int
    realtime: bool
    overruns: int
    skipped_slots: int
    trips: tuple[tuple[int, str], ...] = ()
    rehearsed_losses: int = 0      # link losses an injected fault made: not the link's
    unusable_commands: int = 0     # ticks whose command was NaN or infinite (input held)


@dataclass(frozen=True)
class RuleResult:
    """One acceptance rule, judged: ``passed`` is None when the rule does not apply."""

    rule: str
    passed: bool | None
    measured: str
    needed: str

    def line(self) -> str:
        mark = {True: "held", False: "FAILED", None: "n/a"}[self.passed]
        return f"  {mark:<7} {self.rule}: {self.measured} (needs {self.needed})"

    def as_dict(self) -> dict[str, Any]:
        return {"rule": self.rule, "passed": self.passed, "measured": self.measured,
                "needed": self.needed}


@dataclass
class Outcome:
    """The one way a run ended."""

    ended: str
    reason: str
    rules: list[RuleResult] = field(default_factory=list)

    @property
    def exit_code(self) -> int:
        return EXIT_CODES[self.ended]


def judge(rules: AcceptanceRules, facts: RunFacts,
          expected_trips: set[str] | frozenset[str] = frozenset()) -> list[RuleResult]:
    """Every acceptance rule against what the run did."""
    out = [RuleResult("ran to the end", facts.ticks_run == facts.ticks_planned,
                      f"{facts.ticks_run} of {facts.ticks_planned} ticks",
                      "every planned tick")]
    if facts.on_link:
        share = facts.answered / facts.ticks_run if facts.ticks_run else 0.0
        rehearsed = (f"; {facts.rehearsed_losses} rehearsed loss(es) not counted"
                     if facts.rehearsed_losses else "")
        out.append(RuleResult("link kept", facts.link_losses == 0 or rules.allow_link_loss,
                              f"lost {facts.link_losses} time(s){rehearsed}",
                              "any" if rules.allow_link_loss else "never lost"))
        out.append(RuleResult("controller answered", share >= rules.min_answered,
                              f"{_pct(share)} of ticks had a fresh command",
                              f">= {_pct(rules.min_answered)}"))
    else:
        out.append(RuleResult("link kept", None, "no link", "a link"))
        out.append(RuleResult("controller answered", None, "built-in controller", "a link"))
    out.append(RuleResult("commands usable", facts.unusable_commands == 0,
                          f"{facts.unusable_commands} tick(s) with a NaN or infinite "
                          "command, the last good input held", "none"))
    if facts.realtime:
        late = facts.overruns + facts.skipped_slots
        share = late / facts.ticks_run if facts.ticks_run else 0.0
        out.append(RuleResult("real time held", share <= rules.max_late,
                              f"{facts.overruns} late ticks and {facts.skipped_slots} skipped "
                              f"slots in {facts.ticks_run} ({_pct(share)})",
                              f"<= {_pct(rules.max_late)}"))
    else:
        out.append(RuleResult("real time held", None, "fast mode", "real time"))
    allowed = set(rules.allowed_trips) | set(expected_trips)
    unexpected = [(k, name) for k, name in facts.trips if name not in allowed]
    out.append(RuleResult("no unexpected trip", not unexpected,
                          ", ".join(f"{name} at tick {k}" for k, name in unexpected)
                          or (f"{len(facts.trips)} trip(s), all expected" if facts.trips
                              else "no trip"),
                          "only " + ", ".join(sorted(allowed)) if allowed else "no trip"))
    return out


def settle(ended: str, reason: str, results: list[RuleResult]) -> Outcome:
    """The outcome of a run that ended as (``ended``, ``reason``), after its rules.

    A run that stopped early keeps the reason it stopped; a run that reached its last
    tick is completed only if every rule held: a failed trip rule makes it tripped, any
    other failed rule a fault (the first one names the reason).
    """
    if ended != COMPLETED:
        return Outcome(ended, reason, results)
    failed = [r for r in results if r.passed is False]
    if not failed:
        return Outcome(COMPLETED, reason, results)
    others = [r for r in failed if r.rule != "no unexpected trip"]
    first = others[0] if others else failed[0]
    kind = FAULT if others else TRIPPED
    return Outcome(kind, f"acceptance rule '{first.rule}' not met: {first.measured} "
                         f"(needs {first.needed})", results)


def _pct(share: float) -> str:
    return f"{share * 100:.4g} %"


def parse_acceptance(c: Any, doc: dict[str, Any], interlock_names: list[str]) -> AcceptanceRules:
    """Check the ``[acceptance]`` table (``c`` is the rig file's checker)."""
    t = c.table(doc, "acceptance", "", required=False)
    c.no_unknown(t, ACCEPTANCE_KEYS, "acceptance")

    def share(v: Any) -> str | None:
        return None if 0.0 <= v <= 1.0 else f"expected a share from 0 to 1, found {v!r}"

    d = AcceptanceRules()
    answered = c.take(t, "min_answered", "acceptance", "number", default=d.min_answered,
                      check=share)
    late = c.take(t, "max_late", "acceptance", "number", default=d.max_late, check=share)
    loss = c.take(t, "allow_link_loss", "acceptance", "bool", default=d.allow_link_loss)
    trips = c.take(t, "allowed_trips", "acceptance", "list", default=[])
    names = []
    for i, name in enumerate(trips or []):
        if name not in interlock_names:
            known = ", ".join(interlock_names) or "none"
            c.add(f"acceptance.allowed_trips[{i}]",
                  f"expected the name of an interlock ({known}), found {name!r}")
        else:
            names.append(name)
    return AcceptanceRules(
        float(answered if answered is not None else d.min_answered),
        bool(loss if loss is not None else d.allow_link_loss),
        float(late if late is not None else d.max_late), tuple(names))
