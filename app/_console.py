"""What a finished run prints: the outcome first, then the numbers, in human units.

One function for `run`, `demo` and `rerun`, so the same run reads the same everywhere.
Every count printed here is the summary's own (summary.json holds the rest, zeros too).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

REHEARSED = {"frames_dropped": "frames dropped", "frames_corrupted": "frames corrupted",
             "rehearsed_losses": "link losses (each a link-lost event)"}


def human_duration(seconds: float) -> str:
    """A duration in the unit a person reads at a glance: 3.2 us, 2.43 ms, 76.5 s."""
    s = abs(seconds)
    if s == 0:
        return "0 s"
    if s < 1e-3:
        return f"{seconds * 1e6:.3g} us"
    if s < 1.0:
        return f"{seconds * 1e3:.3g} ms"
    if s < 600:
        return f"{seconds:.3g} s"
    return f"{seconds / 60:.3g} min"


def dut_text(dut: Any) -> str:
    """The device under test as recorded with the run (console and report)."""
    if not isinstance(dut, dict) or not any(dut.values()):
        return ("not named (plantrig run --dut NAME --firmware VERSION, or the rig file's "
                "[dut] table)")
    parts = [dut.get("name") or "unnamed device"]
    if dut.get("firmware"):
        parts.append(f"firmware {dut['firmware']}")
    if dut.get("serial"):
        parts.append(f"serial {dut['serial']}")
    return ", ".join(parts)


def print_outcome(folder: Path, summary: dict[str, Any], scenario: str | None = None) -> None:
    """The run's outcome, acceptance, timing, link, events and record, on stdout; for a
    rehearsal, the ``scenario``'s name and its verdicts after them."""
    timing = summary["timing"]
    print(f"run folder: {folder}")
    if summary.get("dut"):
        print(f"device under test: {dut_text(summary['dut'])}")
    print(f"outcome: {summary['ended'].upper()} ({summary['reason']})")
    print(f"ticks: {summary.get('ticks_run', summary['ticks_recorded'])} of "
          f"{summary['ticks_planned']} planned ran, {summary['ticks_recorded']} recorded")
    if summary.get("acceptance"):
        print("acceptance:")
        for rule in summary["acceptance"]:
            mark = {True: "held", False: "FAILED", None: "n/a"}[rule["passed"]]
            print(f"  {mark:<7} {rule['rule']}: {rule['measured']} (needs {rule['needed']})")
    loop = timing.get("loop_s") or timing["wall_s"]
    if summary["mode"] == "realtime":
        print(f"timing: real time, {timing['ticks_per_s']:.0f} ticks/s over "
              f"{human_duration(loop)} of ticks ({human_duration(timing['wall_s'])} in all); "
              f"lateness p50 {human_duration(timing['lateness_p50_s'])}, p99 "
              f"{human_duration(timing['lateness_p99_s'])}, max "
              f"{human_duration(timing['lateness_max_s'])}; "
              f"{timing['overruns']} late ticks, {timing['skipped_slots']} skipped slots; "
              f"scheduler {timing['scheduler']}")
    else:
        print(f"timing: fast mode, {timing['ticks_per_s']:.0f} ticks/s "
              f"({human_duration(loop)} of ticks, {human_duration(timing['wall_s'])} in all)")
    health = summary.get("link") or {}
    rehearsed = {k: v for k, v in health.items() if k in REHEARSED and v}
    link = {k: v for k, v in health.items() if k not in REHEARSED}
    if link:
        kind = (summary.get("link_used") or {}).get("kind", "serial")
        print(link_lines(link, summary["rig"]["tick_s"], kind))
    if rehearsed:
        print("rehearsed link faults: " + ", ".join(f"{v:.0f} {REHEARSED[k]}"
                                                    for k, v in rehearsed.items()))
    if summary["events"]:
        print("events: " + ", ".join(f"{k} x{v}" for k, v in sorted(summary["events"].items())))
    record = summary.get("record") or {}
    for problem in [*record.get("lost", []), *record.get("problems", [])]:
        print(f"record: {problem}")
    if record.get("problems"):
        print(f"record: not finished; free space, then: plantrig recover {folder}")
    if scenario is not None:
        from plantrig.sim import verdict_lines
        print(f"scenario: {scenario}")
        print("\n".join(verdict_lines(summary["verdicts"])))


def link_lines(h: dict[str, Any], tick: float, kind: str = "serial") -> str:
    """The link's health in the same words for every kind of link: the counter names of
    docs/protocol.md section 5 (a frame is a serial frame, an MQTT message or a Modbus
    request), then what only this kind counts."""
    def n(key: str) -> str:
        return f"{h.get(key, 0):.0f}"

    bad = sum(v for k, v in h.items() if k.startswith(("bad_", "rejected_")))
    lines = [
        f"link: frames out {n('frames_out')}, frames in {n('frames_in')}, commands in "
        f"{n('commands_in')} (used {n('commands_used')}, superseded {n('superseded')}), "
        f"heartbeats out {n('heartbeats_out')} in {n('heartbeats_in')}, status out "
        f"{n('status_out')} in {n('status_in')}",
        f"link: bad or rejected {bad:.0f}, duplicates {n('duplicates')}, out of order "
        f"{n('out_of_order')}, dropped out {n('dropped_out')}, late answers {n('late')}, "
        f"ticks without a fresh command {n('missed_ticks')}, link lost {n('link_lost')}",
    ]
    if "latency_ticks_p50" in h:
        line = (f"link: answer used {n('latency_ticks_p50')} tick(s) after its sensor values "
                f"p50, {n('latency_ticks_max')} max")
        if "latency_ms_p50" in h:
            where = ("through the broker" if kind == "mqtt" else
                     f"write to read, seen at tick starts, tick {tick * 1e3:g} ms")
            line += (f"; round trip {h['latency_ms_p50']:.3f} ms p50, "
                     f"{h['latency_ms_p99']:.3f} ms p99, {h['latency_ms_max']:.3f} ms max "
                     f"({where})")
        lines.append(line)
    if kind == "mqtt":
        lines.append(f"link: connects {n('connects')}, reconnects {n('reconnects')}, dropped "
                     f"while the broker was away {n('dropped_offline')}")
    elif kind == "modbus":
        codes = sorted(k for k in h if k.startswith("exceptions_"))
        lines.append(f"link: connects {n('connects')}, exception responses "
                     + (", ".join(f"{k[-2:]} x{h[k]:.0f}" for k in codes) or "none"))
    else:
        lines.append(f"link: port errors {n('port_errors')}, bytes in {n('bytes_in')} out "
                     f"{n('bytes_out')}")
    return "\n".join(lines)
