"""``spinflip soak``: the daemon in real time on the simulator, with two subscribers, for long.

What a station left alone for days needs, measured on this machine:

* **samples lost** (target 0): the daemon's own count from its last status message (samples
  the reader could not queue, plus any a source reports lost);
* **messages missed** by each of two subscribers: gaps in the per-topic ``seq`` numbers;
* **RSS growth** (target at most 5 %): the daemon's resident memory at the end against the
  same after a warm-up (the first fifth of the run, at least 10 s), from ``/proc/PID/status``,
  read every second; each is the median over a window of a tenth of the run (at least 5 s),
  since numpy's allocations make the RSS swing by several MB from one second to the next;
* **CPU share**: CPU seconds the daemon used (``/proc/PID/stat`` utime + stime) per second of
  wall-clock time; 1.0 is one core busy. The simulator makes its samples itself, which a
  dongle does for free, so this is an upper bound of what a station needs; with
  ``--source replay:FILE`` a capture is paced in real time (looped, ``source.replay_loop``),
  which costs almost nothing, so the share is the daemon's own at the chosen sample rate and
  channel count (total power: a capture holds one LO; T_sys fixed; flagging on).

It runs ``spinflip run`` as a child process with a temporary configuration (live simulator,
looking near the zenith; loopback sockets on free ports) and a temporary output folder, and
finally checks that every integration the daemon announced is in its FITS file.

References
----------
proc(5), Linux manual: ``/proc/PID/stat`` fields 14-15 (utime, stime in clock ticks) and
``/proc/PID/status`` VmRSS.
"""

from __future__ import annotations

import json
import os
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path

from spinflip.daemon.live.ports import free_loopback_port

_CONFIG = """
[sim]
start = "now"
[pointing]
frame = "azel"
lon = 0.0
lat = 80.0
[spectrometer]
integration_s = {integration_s}
[publish]
data = "tcp://127.0.0.1:{data}"
control = "tcp://127.0.0.1:{control}"
"""

#: The daemon's own cost on a capture (``--source replay:FILE``): the file replayed in real time
#: and looped, total power (a capture holds one LO), T_sys fixed (no noise source to fire),
#: interference flagging as configured by default (on).
_REPLAY_CONFIG = """
[sim]
start = "now"
[source]
kind = "replay"
path = "{path}"
replay_loop = true
sample_rate = {sample_rate}
[calibration]
tsys_from = "fixed"
[pointing]
frame = "azel"
lon = 0.0
lat = 80.0
[spectrometer]
integration_s = {integration_s}
channels = {channels}
[publish]
data = "tcp://127.0.0.1:{data}"
control = "tcp://127.0.0.1:{control}"
"""

RSS_GROWTH_LIMIT = 0.05


def rss_bytes(pid: int) -> int:
    """Resident set size of ``pid`` (``VmRSS`` in /proc/PID/status), bytes."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    raise OSError(f"no VmRSS for process {pid}")


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of ``pid`` (fields 14 and 15 of /proc/PID/stat), s."""
    text = Path(f"/proc/{pid}/stat").read_text()
    fields = text[text.rindex(")") + 2:].split()    # after "pid (comm) "
    ticks = int(fields[11]) + int(fields[12])       # utime, stime: fields 14, 15 of the line
    return ticks / os.sysconf("SC_CLK_TCK")


class _Subscriber(threading.Thread):
    """Counts messages per topic and gaps in their ``seq`` numbers."""

    def __init__(self, endpoint: str, stop: threading.Event):
        super().__init__(daemon=True)
        self.endpoint, self.stop = endpoint, stop
        self.counts: dict = {}
        self.missed = 0
        self.last_status: dict | None = None
        self.integrations: set[tuple] = set()
        self._seq: dict = {}

    def run(self) -> None:
        import zmq

        from spinflip.daemon.live import schema
        sub: zmq.Socket = zmq.Context.instance().socket(zmq.SUB)
        sub.setsockopt(zmq.MAXMSGSIZE, schema.MAX_FRAME_BYTES)
        sub.setsockopt(zmq.SUBSCRIBE, b"")
        sub.setsockopt(zmq.RCVTIMEO, 200)
        sub.connect(self.endpoint)
        try:
            while not self.stop.is_set():
                try:
                    frames = sub.recv_multipart()
                except zmq.Again:
                    continue
                msg = schema.decode(frames)
                topic, header = msg.topic, msg.header
                if header.get("replay"):        # a newcomer's catch-up: not a new message
                    continue
                self.counts[topic] = self.counts.get(topic, 0) + 1
                seq = header.get("seq")
                key = topic                     # the publisher numbers each topic
                if seq is not None and key in self._seq and seq > self._seq[key] + 1:
                    self.missed += seq - self._seq[key] - 1
                if seq is not None:
                    self._seq[key] = seq
                if topic == "status":
                    self.last_status = header
                if topic == "spectrum" and header.get("kind") == "integration":
                    self.integrations.add((header.get("scan"), header.get("row")))
        finally:
            sub.close(linger=0)


def run_soak(seconds: float = 600.0, integration_s: float = 5.0,
             log: Callable[[str], None] | None = None, replay: str | None = None,
             sample_rate: float = 2.4e6, channels: int = 1024) -> dict:
    """Run the daemon for ``seconds`` and measure it; see the module docstring. ``replay``: a
    ``.cu8`` capture replayed in real time (looped) instead of the simulator, at
    ``sample_rate`` with ``channels`` channels, so the CPU share is the daemon's own."""
    log = log or (lambda msg: print(msg, file=sys.stderr, flush=True))
    ports = {"data": free_loopback_port(), "control": free_loopback_port()}
    with tempfile.TemporaryDirectory(prefix="spinflip-soak-") as tmp:
        cfg = Path(tmp) / "soak.toml"
        if replay is None:
            cfg.write_text(_CONFIG.format(integration_s=integration_s, **ports))
        else:
            path = Path(replay).expanduser().resolve()
            cfg.write_text(_REPLAY_CONFIG.format(
                path=str(path).replace("\\", "\\\\").replace('"', '\\"'),
                sample_rate=float(sample_rate), channels=int(channels),
                integration_s=integration_s, **ports))
        out = Path(tmp) / "out"
        stop = threading.Event()
        subs = [_Subscriber(f"tcp://127.0.0.1:{ports['data']}", stop) for _ in range(2)]
        for s in subs:
            s.start()
        proc = subprocess.Popen([sys.executable, "-m", "spinflip.cli", "run", "--config",
                                 str(cfg), "--duration", f"{seconds:g}", "--out", str(out)],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        warmup_s = max(10.0, 0.2 * seconds)
        t0 = time.monotonic()
        cpu0 = None
        rss_peak = 0
        window_s = max(5.0, 0.1 * seconds)
        samples: list = []               # (seconds since start, RSS bytes) after the warm-up
        try:
            while proc.poll() is None:
                time.sleep(1.0)
                el = time.monotonic() - t0
                try:
                    rss = rss_bytes(proc.pid)
                    cpu = cpu_seconds(proc.pid)
                except OSError:
                    break
                if cpu0 is None and el >= warmup_s:
                    cpu0, t_cpu0 = cpu, time.monotonic()
                if cpu0 is not None:
                    cpu_end, t_cpu_end = cpu, time.monotonic()
                    samples.append((el, rss))
                    rss_peak = max(rss_peak, rss)
                if int(el) % 60 == 0 and el > 1:
                    log(f"soak: {el:.0f} of {seconds:.0f} s, RSS {rss / 1e6:.1f} MB")
            stdout, stderr = proc.communicate(timeout=120)
        finally:
            if proc.poll() is None:
                proc.kill()
            time.sleep(0.5)
            stop.set()
            for s in subs:
                s.join(timeout=5)
        from spinflip.daemon.storage.fits_file import read_scan
        rows = 0
        for f in sorted(out.glob("*.fits")):
            rows += len(read_scan(f)[1])
        status = next((s.last_status for s in subs if s.last_status), {}) or {}
        announced = max(len(s.integrations) for s in subs)
    cpu_share = ((cpu_end - cpu0) / (t_cpu_end - t_cpu0)
                 if cpu0 is not None and t_cpu_end > t_cpu0 else float("nan"))
    rss_warm = rss_end = 0.0
    if samples:
        t_first, t_last = samples[0][0], samples[-1][0]
        rss_warm = statistics.median(r for t, r in samples if t <= t_first + window_s)
        rss_end = statistics.median(r for t, r in samples if t >= t_last - window_s)
    growth = (rss_end - rss_warm) / rss_warm if rss_warm else float("nan")
    return {
        "seconds": seconds, "exit_code": proc.returncode,
        "source": "simulator" if replay is None else f"replay:{replay}",
        "sample_rate": sample_rate if replay is not None else 2.4e6,
        "channels": channels if replay is not None else 1024,
        "stderr_tail": stderr.strip().splitlines()[-3:] if stderr else [],
        "samples_received": status.get("samples_received"),
        "samples_lost": status.get("samples_lost"),
        "messages": [s.counts for s in subs],
        "messages_missed": [s.missed for s in subs],
        "integrations_published": announced, "integrations_saved": rows,
        "rss_after_warmup_mb": rss_warm / 1e6, "rss_end_mb": rss_end / 1e6,
        "rss_peak_mb": rss_peak / 1e6, "rss_growth": growth,
        "cpu_share_of_one_core": cpu_share, "cores": os.cpu_count(),
    }


def verdict(r: dict) -> list[str]:
    """What missed a target (empty: every target met)."""
    bad = []
    if r["exit_code"] != 0:
        bad.append(f"the daemon exited with {r['exit_code']}: {' | '.join(r['stderr_tail'])}")
    if r["samples_lost"] is None or r["samples_lost"] > 0:
        bad.append(f"samples lost: {r['samples_lost']} (target 0)")
    if any(r["messages_missed"]):
        bad.append(f"messages missed by the subscribers: {r['messages_missed']} (target 0)")
    if not r["rss_growth"] <= RSS_GROWTH_LIMIT:
        bad.append(f"RSS grew {100 * r['rss_growth']:.1f} % after the warm-up (target at most "
                   f"{100 * RSS_GROWTH_LIMIT:.0f} %)")
    if r["integrations_saved"] < r["integrations_published"]:
        bad.append(f"{r['integrations_published']} integrations published but "
                   f"{r['integrations_saved']} saved")
    return bad


def format_soak(r: dict) -> str:
    what = ("real-time simulator" if r["source"] == "simulator" else
            f"{r['source']} in real time, {r['sample_rate'] / 1e6:g} MS/s, {r['channels']} "
            "channels")
    lines = [
        f"soak of {r['seconds']:.0f} s, {what}, two subscribers ({r['cores']} cores)",
        f"  samples lost       {r['samples_lost']} of {r['samples_received']} received (target 0)",
        f"  messages missed    {r['messages_missed'][0]} and {r['messages_missed'][1]} "
        f"(of {sum(r['messages'][0].values())} and {sum(r['messages'][1].values())})",
        f"  RSS (medians)      {r['rss_after_warmup_mb']:.1f} MB after warm-up -> "
        f"{r['rss_end_mb']:.1f} MB at the end: {100 * r['rss_growth']:+.1f} % (target <= 5 %)",
        f"  CPU share          {r['cpu_share_of_one_core']:.2f} of one core",
        f"  integrations       {r['integrations_published']} published, "
        f"{r['integrations_saved']} saved",
    ]
    bad = verdict(r)
    lines.append("  verdict            " + ("every target met" if not bad else "; ".join(bad)))
    return "\n".join(lines)


def soak_main(seconds: float, as_json: bool, check: bool, replay: str | None = None,
              sample_rate: float = 2.4e6, channels: int = 1024) -> int:
    r = run_soak(seconds, replay=replay, sample_rate=sample_rate, channels=channels)
    print(json.dumps(r, indent=2) if as_json else format_soak(r))
    return 1 if (check and verdict(r)) else 0
