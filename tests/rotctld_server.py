"""A real ``rotctld`` (Hamlib's rotator daemon, Debian package libhamlib-utils) for the tests:
its dummy rotator (model 1) on a free loopback port, moving both axes at about 6 deg/s in real
time, az -180..450 and el 0..90 (observed with Hamlib 4.5.4)."""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import time

from spinflip.daemon.live.ports import free_loopback_port

ROTCTLD = shutil.which("rotctld") or "/usr/bin/rotctld"


class Rotctld:
    """``rotctld -m 1 -T 127.0.0.1 -t PORT``; :meth:`start` again after :meth:`kill` reuses
    the port."""

    def __init__(self, port: int | None = None) -> None:
        self.port = port or free_loopback_port()
        self.endpoint = f"127.0.0.1:{self.port}"
        self.proc: subprocess.Popen | None = None

    def start(self, wait_s: float = 10.0) -> Rotctld:
        self.proc = subprocess.Popen([ROTCTLD, "-m", "1", "-T", "127.0.0.1", "-t", str(self.port)],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + wait_s
        while True:
            try:
                socket.create_connection(("127.0.0.1", self.port), timeout=1.0).close()
                return self
            except OSError:
                if self.proc.poll() is not None or time.monotonic() > deadline:
                    self.kill()
                    raise RuntimeError(f"rotctld did not start on port {self.port}") from None
                time.sleep(0.05)

    def kill(self) -> None:
        if self.proc is not None:
            if self.proc.poll() is None:
                os.kill(self.proc.pid, signal.SIGCONT)      # in case a test paused it
                self.proc.kill()
            self.proc.wait(timeout=10)
            self.proc = None

    def pause(self) -> None:
        assert self.proc is not None
        os.kill(self.proc.pid, signal.SIGSTOP)

    def resume(self) -> None:
        assert self.proc is not None
        os.kill(self.proc.pid, signal.SIGCONT)
