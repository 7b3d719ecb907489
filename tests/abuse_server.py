"""Test helper: the daemon's live sockets alone, in a process of their own, for abuse tests.

``python tests/abuse_server.py [--keys DIR]`` binds a :class:`~spinflip.daemon.live.publisher.
Publisher` (XPUB data socket) and a :class:`~spinflip.daemon.live.control.ControlServer` (control
socket) on free loopback ports, prints one JSON line ``{"data": ..., "control": ...}``,
publishes a status message every 0.1 s and runs until its standard input closes. The control
handler counts the calls per command and returns the counts (``status`` returns them too),
so a test can tell how often a command was applied. Memory is read by the test from
``/proc/PID/status`` (VmRSS).
"""

import json
import sys
import threading

import wire_examples

from spinflip.daemon.live import schema
from spinflip.daemon.live.control import ControlServer
from spinflip.daemon.live.publisher import Publisher


def status_header(n: int) -> dict:
    """A valid status header whose numbers follow ``n`` (also used by the abuse tests)."""
    return wire_examples.status_header(
        lo_hz=1.42e9, gain_db=40.0, sample_rate_hz=2.4e6, tsys_k=100.0 + n, tsys_source="fixed",
        samples_received=n, samples_lost=0, queue_depth=0, disk_free_bytes=1,
        uptime_s=float(n), version="0", scan="s1", drops={},
        pointing={"frame": "galactic", "lon_deg": 30.0, "lat_deg": 0.0, "object": "x"},
        rfi={"impulses": 0, "carrier_onsets": 0, "sk_cells": 0, "blanked_spectra": 0})


def main() -> int:
    security = None
    if len(sys.argv) == 3 and sys.argv[1] == "--keys":
        import zmq

        from spinflip.daemon.live.keys import ServerSecurity
        security = ServerSecurity.from_config({"keys": sys.argv[2]})
        security.start(zmq.Context.instance())
    calls: dict = {}

    def handler(cmd, args):
        calls[cmd] = calls.get(cmd, 0) + 1
        return {"calls": dict(calls)}

    pub = Publisher("tcp://127.0.0.1:*", security)
    pub.start()
    ctl = ControlServer("tcp://127.0.0.1:*", handler, security).start()
    print(json.dumps({"data": pub.bound, "control": ctl.bound_endpoint}), flush=True)
    stop = threading.Event()

    def publish():
        n = 0
        while not stop.wait(0.1):
            n += 1
            pub.publish("status", dict(status_header(n), time_utc=schema.now_utc_iso()))

    thread = threading.Thread(target=publish, daemon=True)
    thread.start()
    sys.stdin.read()                 # until the test closes our stdin
    stop.set()
    thread.join()
    pub.stop()
    ctl.stop()
    if security is not None:
        security.stop()
    return 0


if __name__ == "__main__":
    sys.exit(main())
