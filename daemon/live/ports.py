"""Free loopback ports, for the demo, the soak and the tests (never the default ports)."""

from __future__ import annotations

import socket


def free_loopback_port() -> int:
    """A TCP port of 127.0.0.1 that was free a moment ago (the kernel's choice)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])
