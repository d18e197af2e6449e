"""`plantrig check RIG --bench`: the facts are read from this machine's /proc and /sys,
the pacing test really runs at the rig's tick, and the verdict agrees with the exit code.
Whether the rate holds depends on the machine, so the test checks the report's shape and
its honesty, never a timing figure."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

from plantrig.sim.engine._readiness import _cpu_list, machine_facts

REPO = Path(__file__).resolve().parents[1]


def test_the_report_reads_this_machine_and_its_verdict_is_the_exit_code() -> None:
    proc = subprocess.run([sys.executable, "-m", "plantrig", "check",
                           str(REPO / "configs" / "conveyor.toml"), "--bench", "--seconds",
                           "0.3"], capture_output=True, text=True, timeout=120)
    out = proc.stdout
    assert proc.returncode in (0, 1), proc.stderr
    for name in ("SCHED_FIFO", "real-time throttling", "CPU frequency governor",
                 "isolated cores", "SMT siblings", "timer slack", "memory locking",
                 "load on core", "per-tick cost of this rig"):
        assert name in out, name
    test = re.search(r"(\d+) ticks paced at 1000 Hz .*: (\d+) missed deadlines", out)
    assert test and int(test.group(1)) == 300
    holds = "the rate HOLDS here" in out
    assert holds == (proc.returncode == 0) and holds != ("does NOT hold" in out)
    assert "site's IT and safety rules" in out
    # the throttling line is what the kernel says
    runtime = Path("/proc/sys/kernel/sched_rt_runtime_us").read_text().strip()
    facts = {f.name: f for f in machine_facts(0)}
    if runtime == "-1":
        assert facts["real-time throttling"].value.startswith("off")
    else:
        assert "of each" in facts["real-time throttling"].value


def test_a_pacing_test_too_short_to_say_anything_is_a_usage_mistake() -> None:
    # a test of 0 s paced one tick and said the rate held (exit 0)
    for seconds in ("0", "-5", "0.05", "nan"):
        proc = subprocess.run([sys.executable, "-m", "plantrig", "check",
                               str(REPO / "configs" / "conveyor.toml"), "--bench",
                               "--seconds", seconds], capture_output=True, text=True,
                              timeout=120)
        assert proc.returncode == 2, (seconds, proc.stdout, proc.stderr)
        assert "--seconds: expected at least 0.1 s" in proc.stderr
        assert "HOLDS" not in proc.stdout


def test_kernel_cpu_lists_are_read_as_the_kernel_writes_them() -> None:
    # the list format of Documentation/admin-guide/cputopology (common practice)
    assert _cpu_list("0-2,5,7-8") == {0, 1, 2, 5, 7, 8}
    assert _cpu_list("") == set() and _cpu_list("3") == {3}
