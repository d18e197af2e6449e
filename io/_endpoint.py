"""`--port` for a network link: "HOST:PORT" or "PORT", checked before anything starts."""

from __future__ import annotations


def parse_endpoint(text: str) -> tuple[str, int]:
    """(host, port) of ``text``; host is "" when only a port is given. ValueError names
    what was wrong (a run given a bad --port must stop before it starts, not fault)."""
    host, _, port = text.rpartition(":")
    if not port.isdigit() or not 0 < int(port) < 65536:
        raise ValueError(f"expected host:port or a port number 1..65535, found {text!r}")
    return host, int(port)
