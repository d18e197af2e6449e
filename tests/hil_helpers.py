"""Helpers shared by the link tests: the fast-mode twin of a link rig, float32 rounding,
and the reference controller on a pty in its own process."""

from __future__ import annotations

import contextlib
import dataclasses
import os
import re
import signal
import subprocess
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from plantrig._hil import controller_command, wait_ready
from plantrig.io import PtyPair
from plantrig.sim import Rig, RigFileError, RigIssue, load_rig


def builtin_twin(rig: Rig) -> Rig:
    """The same rig with the reference controller's law built in and no link."""
    assert rig.link is not None and rig.link.controller is not None
    return dataclasses.replace(rig, controller=rig.link.controller, link=None)


class Float32:
    """A signal chain that rounds to float32, as the binary wire and payload do."""

    def apply(self, tick: int, src: np.ndarray, dst: np.ndarray) -> None:
        dst[:] = src.astype(np.float32)

    def reset(self) -> None:
        pass


@contextlib.contextmanager
def pty_controller(rig_path: Path, pair: PtyPair) -> Iterator[subprocess.Popen[str]]:
    """`plantrig controller` on the slave end of ``pair``, in its own process; it is
    resumed (if a test stopped it) and reaped afterwards."""
    proc = subprocess.Popen(controller_command(rig_path, pair.slave_path),
                            stdout=subprocess.PIPE, text=True)
    try:
        assert wait_ready(proc, 30.0), "the reference controller did not start"
        pair.close_slave()
        yield proc
    finally:
        pair.close_slave()
        pair.close_master()
        with contextlib.suppress(ProcessLookupError):
            os.kill(proc.pid, signal.SIGCONT)
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        assert proc.stdout is not None
        proc.stdout.close()


def rig_issues(path: Path) -> list[RigIssue]:
    """Every mistake load_rig finds in a rig file ([] when it loads)."""
    try:
        load_rig(path)
    except RigFileError as exc:
        return exc.issues
    return []


# the reference controller's closing lines, one form for every link (io end_lines)
CLOSING = re.compile(r"^controller: (?P<reason>[^;\n]+); answered (?P<answered>\d+)"
                     r"(?:, [a-z ]+ \d+)*\ncontroller: rig states (?P<states>.+)$", re.M)


def controller_closing(text: str) -> re.Match[str]:
    """The reference controller's closing lines in a console ``text``."""
    found = CLOSING.search(text)
    assert found, text
    return found
