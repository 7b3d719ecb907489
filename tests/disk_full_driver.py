"""Run the daemon onto a tiny tmpfs, fill it up, free it again; print what happened as JSON.

Run inside a private mount namespace (``unshare -m``, as root) by ``test_faults.py``:
``python disk_full_driver.py WORKDIR``. The tmpfs is mounted at WORKDIR/out; the daemon's
log goes to WORKDIR (not on the tmpfs).
"""

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from cli_runner import live_config  # noqa: E402  (tests/ is on the path now)


def wait_for(cond, timeout_s=60.0):
    deadline = time.monotonic() + timeout_s
    while not cond():
        if time.monotonic() > deadline:
            raise SystemExit(f"timed out waiting for {cond.__doc__}")
        time.sleep(0.05)


def main(work: Path) -> None:
    from spinflip.daemon.storage.fits_file import read_scan
    from spinflip.daemon.storage.journal import count_rows
    out = work / "out"
    out.mkdir(exist_ok=True)
    subprocess.run(["mount", "-t", "tmpfs", "-o", "size=2m", "spinflip-test", str(out)],
                   check=True)
    cfg = work / "c.toml"
    cfg.write_text(live_config(0.5, channels=256))
    log_path = work / "daemon.log"
    log = open(log_path, "w")
    proc = subprocess.Popen([sys.executable, "-m", "spinflip.cli", "run", "--config",
                             str(cfg), "--out", str(out)], stdout=log, stderr=subprocess.STDOUT)

    def rows_on_disk():
        """two rows in the journal"""
        js = list(out.glob("*.journal"))
        return bool(js) and count_rows(js[0]) >= 2

    def said(text):
        def cond():
            return text in log_path.read_text()
        cond.__doc__ = repr(text)
        return cond

    wait_for(rows_on_disk)
    ballast = out / "ballast"
    with open(ballast, "wb") as fh:          # fill the file system to the last byte
        try:
            while True:
                fh.write(b"\0" * 65536)
                fh.flush()
        except OSError:
            pass
    t_full = time.monotonic()
    wait_for(said("writing paused"))
    time.sleep(2.0)                          # integrations pile up in memory meanwhile
    ballast.unlink()
    t_freed = time.monotonic()
    wait_for(said("resumed"))
    time.sleep(1.0)
    proc.send_signal(signal.SIGTERM)
    proc.wait(timeout=30)
    log.close()
    files = sorted(p.name for p in out.iterdir())
    dates = []
    for f in sorted(out.glob("*.fits")):
        dates += [str(d) for d in read_scan(f)[1]["DATE-OBS"]]
    print(json.dumps({"returncode": proc.returncode, "log": log_path.read_text(),
                      "files": files, "dates": dates, "full_s": t_freed - t_full}))


if __name__ == "__main__":
    main(Path(sys.argv[1]))
