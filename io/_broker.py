"""A local mosquitto broker for the MQTT demo and the tests (only), on a free loopback port.

The broker gets a generated configuration file: a listener on 127.0.0.1 only, no
persistence, ``set_tcp_nodelay true`` (docs/platform.md: QoS 1 round trip 0.64 ms instead
of 88 ms with Nagle's algorithm), anonymous access unless a password file is asked for.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import socket
import subprocess
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

READY_TIMEOUT_S = 5.0


class BrokerError(RuntimeError):
    """mosquitto is missing or would not start; the message says what to do."""


def find_mosquitto() -> str:
    """Path of the mosquitto executable, or BrokerError saying how to get it."""
    found = shutil.which("mosquitto") or next(
        (p for p in ("/usr/sbin/mosquitto", "/usr/local/sbin/mosquitto") if os.access(p, os.X_OK)),
        None)
    if found is None:
        raise BrokerError("mosquitto not found on PATH or in /usr/sbin: install it "
                          "(Debian/Ubuntu: apt-get install mosquitto mosquitto-clients)")
    return found


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class LocalBroker:
    """mosquitto on 127.0.0.1:<port>; start(), stop(), restart() on the same port."""

    def __init__(self, port: int | None = None, *, users: dict[str, str] | None = None,
                 tls: tuple[Path, Path, Path] | None = None) -> None:
        """``users``: name -> password (a password file instead of anonymous access);
        ``tls``: (CA, certificate, key) files, PEM, for a TLS-only listener."""
        self.executable = find_mosquitto()
        self.host = "127.0.0.1"
        self.port = port or free_port()
        self.dir = Path(tempfile.mkdtemp(prefix="plantrig-mosquitto-"))
        self.log = self.dir / "mosquitto.log"
        self.conf = self.dir / "mosquitto.conf"
        self.process: subprocess.Popen[bytes] | None = None
        # mosquitto started as root drops to its own user before it opens these
        self.dir.chmod(0o755)
        self.log.touch(mode=0o666)
        self.log.chmod(0o666)
        lines = [f"listener {self.port} 127.0.0.1"]
        if tls:
            for name, src in zip(("ca.pem", "cert.pem", "key.pem"), tls, strict=True):
                shutil.copyfile(src, self.dir / name)
                (self.dir / name).chmod(0o644)
            lines += [f"cafile {self.dir / 'ca.pem'}", f"certfile {self.dir / 'cert.pem'}",
                      f"keyfile {self.dir / 'key.pem'}"]
        lines += ["set_tcp_nodelay true",
                 "persistence false", f"log_dest file {self.log}", "log_type error",
                 "log_type warning", "log_type notice"]
        if users:
            passwd = shutil.which("mosquitto_passwd") or "/usr/bin/mosquitto_passwd"
            pw_file = self.dir / "passwords"
            for i, (user, password) in enumerate(users.items()):
                flags = ["-c"] if i == 0 else []
                subprocess.run([passwd, *flags, "-b", str(pw_file), user, password],
                               check=True, capture_output=True)
            pw_file.chmod(0o644)
            lines += ["allow_anonymous false", f"password_file {pw_file}"]
        else:
            lines.append("allow_anonymous true")
        self.conf.write_text("\n".join(lines) + "\n")

    def __iter__(self) -> Iterator[str | int]:
        """``host, port = broker``."""
        return iter((self.host, self.port))

    def __enter__(self) -> LocalBroker:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def running(self) -> bool:
        return self.process is not None and self.process.poll() is None

    def start(self) -> None:
        """Start mosquitto and return once it accepts TCP connections."""
        if self.running:
            return
        deadline = time.monotonic() + READY_TIMEOUT_S
        while True:
            self.process = subprocess.Popen([self.executable, "-c", str(self.conf)],
                                            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                            stderr=subprocess.PIPE)
            while time.monotonic() < deadline and self.process.poll() is None:
                with contextlib.suppress(OSError), socket.create_connection(
                        (self.host, self.port), timeout=0.2):
                    return  # a TCP accept is enough: TLS and MQTT come after
                time.sleep(0.02)
            # exited early (the port may still be held after a restart) or never listened
            err = self._stop_process()
            if time.monotonic() >= deadline:
                log = self.log.read_text(errors="replace")[-500:] if self.log.exists() else ""
                raise BrokerError(f"mosquitto did not accept connections on {self.host}:"
                                  f"{self.port} within {READY_TIMEOUT_S} s: {err} {log}".strip())
            time.sleep(0.05)

    def stop(self, *, kill: bool = False) -> None:
        """Stop the broker: SIGTERM (clean) or SIGKILL (``kill``, like a crash)."""
        self._stop_process(kill=kill)

    def restart(self) -> None:
        self.stop()
        self.start()

    def close(self) -> None:
        """Stop the broker for good and remove its files."""
        self._stop_process(kill=True)
        shutil.rmtree(self.dir, ignore_errors=True)

    def _stop_process(self, kill: bool = False) -> str:
        proc, self.process = self.process, None
        if proc is None:
            return ""
        if proc.poll() is None:
            (proc.kill if kill else proc.terminate)()
            try:
                proc.wait(timeout=3.0)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=3.0)
        err = proc.stderr.read().decode(errors="replace").strip() if proc.stderr else ""
        if proc.stderr:
            proc.stderr.close()
        return err
