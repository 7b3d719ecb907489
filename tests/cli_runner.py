"""Test helper: run the ``spinflip`` command (in a subprocess or in this process), and the
simulator's truths."""

import contextlib
import io
import signal
import subprocess
import sys

import numpy as np

from spinflip.daemon.sky.hi_line import C_M_S, HI_REST_FREQ_HZ
from spinflip.daemon.sources.galaxy import ModelGalaxy

#: A ``[publish]`` section with no sockets: a test daemon must never bind the default ports
#: 5621/5622 (tests/conftest.py holds them for the session). Append it to a test's TOML.
NO_PORTS = '[publish]\ndata = ""\ncontrol = ""\n'


def run_cli(args, cwd=None, timeout=180, stdin=None):
    """``python -m spinflip.cli ARGS`` -> CompletedProcess (text, captured)."""
    return subprocess.run([sys.executable, "-m", "spinflip.cli", *map(str, args)],
                          cwd=cwd, capture_output=True, text=True, timeout=timeout, input=stdin)


def run_cli_inprocess(args, stdin=None):
    """``spinflip.cli.main(ARGS)`` in this process -> CompletedProcess, as :func:`run_cli`.

    Standard output and error are captured as text, ``stdin`` (text) feeds ``input()``; an
    argparse exit (SystemExit) gives its code. Saves the second of imports a subprocess costs:
    for the exit-code tests and the runs whose files are what counts. An exception that escapes
    ``main`` fails the test (as a traceback and exit 1 would in a subprocess). The SIGINT and
    SIGTERM handlers a daemon installs are put back afterwards (Ctrl-C stops pytest again).
    """
    from spinflip import cli
    argv = [str(a) for a in args]
    out, err = io.StringIO(), io.StringIO()
    with contextlib.ExitStack() as stack:
        for sig in (signal.SIGINT, signal.SIGTERM):
            stack.callback(signal.signal, sig, signal.getsignal(sig))
        stack.enter_context(contextlib.redirect_stdout(out))
        stack.enter_context(contextlib.redirect_stderr(err))
        if stdin is not None:
            old_stdin = sys.stdin
            sys.stdin = io.StringIO(stdin)
            stack.callback(setattr, sys, "stdin", old_stdin)
        try:
            code = cli.main(argv)
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
            if isinstance(exc.code, str):
                err.write(exc.code + "\n")
    return subprocess.CompletedProcess(["spinflip", *argv], code, out.getvalue(), err.getvalue())


def write_config(path, text):
    path.write_text(text)
    return path


def beam_fwhm_deg(dish_m=3.0):
    """HPBW ~ 1.2 lambda / D (common practice), as the simulator smooths its sky."""
    return float(np.degrees(1.2 * (C_M_S / HI_REST_FREQ_HZ) / dish_m))


def model_line(glon_deg, glat_deg, v_km_s):
    """The simulator's beam-smoothed line brightness T_B(v), K."""
    return ModelGalaxy().brightness_temperature(glon_deg, glat_deg, v_km_s,
                                                beam_fwhm_deg=beam_fwhm_deg())


def true_tsys_k(glon_deg, glat_deg, receiver_k=55.0, spillover_k=12.0):
    """The simulator's true Tsys: continuum + spillover + receiver (noise source off)."""
    return ModelGalaxy().continuum_temperature(glon_deg, glat_deg) + spillover_k + receiver_k


_LIVE_SIM_SOURCE = "sample_rate = 1.2e6\nblock_samples = 131072"


def live_config(integration_s, source=_LIVE_SIM_SOURCE, channels=1024, data=""):
    """A real-time configuration looking near the zenith (always up), with a fixed Tsys and
    no control socket: the fault tests' daemon. ``source`` is the body of ``[source]`` (default:
    the live simulator at a low rate), ``data`` the live-data endpoint ('' for none)."""
    return f"""
[source]
{source}
[sim]
start = "now"
[pointing]
frame = "azel"
lon = 0.0
lat = 80.0
[spectrometer]
channels = {channels}
integration_s = {integration_s}
[calibration]
tsys_from = "fixed"
[publish]
data = "{data}"
control = ""
"""
