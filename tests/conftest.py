"""Session-wide test setup: the default ports guard, and simulated scans shared by modules.

The default ports guard
-----------------------
A daemon left with the default ``[publish]`` section binds ``tcp://127.0.0.1:5621`` (data)
and ``:5622`` (control): a test doing so would collide with a daemon running on the machine,
with another test run, and with the other xdist worker. For the whole session the process
that runs pytest (the xdist controller, or the only process without xdist) holds both ports
itself, listening on 127.0.0.1: a test daemon that binds them (in this process or in a
subprocess) fails at start with "Address already in use", and so does its test. A test
daemon uses free ports (``spinflip.daemon.live.ports.free_loopback_port``) or
``data = ""`` / ``control = ""``.

If a port is already taken when the session starts (a daemon running here, or another test
run) the guard cannot hold it: the header says so, and every test still runs.
"""

from __future__ import annotations

import socket

import pytest
from sim_scans import run_l30_scan

DEFAULT_PORTS = (5621, 5622)          # [publish] data and control defaults (daemon/config.py)


def _hold(port: int) -> socket.socket | None:
    """A socket listening on 127.0.0.1:port, or None if the port is taken."""
    s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    try:
        s.bind(("127.0.0.1", port))
        s.listen(1)               # a listening socket: even SO_REUSEADDR binds fail (socket(7))
    except OSError:
        s.close()
        return None
    return s


def _is_controller(config) -> bool:
    return not hasattr(config, "workerinput")        # xdist workers have workerinput


def pytest_configure(config):
    config._spinflip_held = {}
    config._spinflip_busy = []
    if _is_controller(config):
        for port in DEFAULT_PORTS:
            s = _hold(port)
            if s is None:
                config._spinflip_busy.append(port)
            else:
                config._spinflip_held[port] = s


def pytest_unconfigure(config):
    for s in getattr(config, "_spinflip_held", {}).values():
        s.close()


def pytest_report_header(config):
    held = sorted(getattr(config, "_spinflip_held", {}))
    busy = getattr(config, "_spinflip_busy", [])
    line = f"default ports guard: holding 127.0.0.1 ports {held or 'none'}"
    if busy:
        line += (f"; ports {busy} already taken by another program, so a test binding them "
                 "is not caught in this run")
    return line


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item, call):
    """A failure mentioning a default port gets a note naming the guard."""
    outcome = yield
    rep = outcome.get_result()
    if rep.failed and any(str(p) in str(rep.longrepr) for p in DEFAULT_PORTS):
        rep.sections.append(("default ports guard", (
            "tests/conftest.py holds 127.0.0.1:5621 and :5622 for the session: a test daemon "
            "must use free ports (free_loopback_port) or [publish] data = \"\", control = \"\"")))


@pytest.fixture(scope="session")
def clean_l30_scan(tmp_path_factory):
    """The simulated 40-s scan at l = 30 deg without interference (tests/sim_scans.py), run
    once per session (per xdist worker) for test_rfi_sim.py and test_run.py."""
    return run_l30_scan(tmp_path_factory.mktemp("l30"), False)
