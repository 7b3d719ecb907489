"""RSS of a real ``spinflip run`` daemon before and after the oversized-frame and subscription
attacks (issue 12): two raw peers announce 1 GiB frames to the control and the data socket,
then one peer sends a 16 MiB subscription. Loopback and free ports only; about 20 s.

    .venv/bin/python scripts/abuse_rss.py
"""
import os
import socket
import struct
import subprocess
import sys
import tempfile
import time


def free():
    s = socket.socket(); s.bind(("127.0.0.1", 0)); p = s.getsockname()[1]; s.close(); return p
def rss(pid):
    for line in open(f"/proc/{pid}/status"):
        if line.startswith("VmRSS"): return int(line.split()[1]) / 1024
GREET = b"\xff" + b"\0"*8 + b"\x7f" + b"\x03\x00" + b"NULL".ljust(20, b"\0") + b"\0" + b"\0"*31
def ready(kind):
    body = b"\x05READY" + b"\x0bSocket-Type" + struct.pack(">I", len(kind)) + kind
    return b"\x04" + bytes([len(body)]) + body
def send_until_dropped(s, total):
    sent, piece = 0, b"\0" * (1 << 20)
    try:
        while sent < total:
            s.sendall(piece); sent += len(piece)
    except OSError: pass
    return sent
d, c = free(), free()
tmp = tempfile.mkdtemp()
cfg = os.path.join(tmp, "c.toml")
open(cfg, "w").write(f'[sim]\nstart = "now"\n[pointing]\nframe = "azel"\nlon = 0.0\nlat = 80.0\n[calibration]\ntsys_from = "fixed"\n[publish]\ndata = "tcp://127.0.0.1:{d}"\ncontrol = "tcp://127.0.0.1:{c}"\n')
p = subprocess.Popen([sys.executable, "-m", "spinflip.cli", "run", "--config", cfg, "--out", os.path.join(tmp, "out")], stderr=subprocess.DEVNULL, stdout=subprocess.DEVNULL)
time.sleep(8)
r0 = rss(p.pid); print(f"daemon RSS at rest: {r0:.0f} MB")
for name, port in (("control", c), ("data", d)):
    conns, sent = [], 0
    for _ in range(2):
        s = socket.create_connection(("127.0.0.1", port), timeout=10); conns.append(s)
        s.sendall(GREET); s.sendall(b"\x06" + struct.pack(">Q", 1 << 30))
        sent += send_until_dropped(s, 256 << 20)
    time.sleep(1); r = rss(p.pid)
    print(f"after two 1 GiB frames announced to the {name} socket ({sent >> 20} MiB accepted): {r:.0f} MB")
    for s in conns: s.close()
s = socket.create_connection(("127.0.0.1", d), timeout=10)
s.sendall(GREET + ready(b"SUB")); size = 16 << 20
try:
    s.sendall(b"\x02" + struct.pack(">Q", size) + b"\x01"); send_until_dropped(s, size - 1)
except OSError: pass
time.sleep(2); r = rss(p.pid); print(f"after one 16 MiB subscription: {r:.0f} MB")
s.close(); time.sleep(2); print(f"after that peer left: {rss(p.pid):.0f} MB")
p.terminate(); p.wait(30)
