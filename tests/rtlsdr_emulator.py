"""Test helper: an emulated librtlsdr (``tests/fake_librtlsdr.c``) built once per session.

The emulated dongle (serial :data:`SERIAL`) streams synthetic 8-bit IQ in real time through
the real pyrtlsdr ctypes layer and fails on cue: a control file named by ``FAKERTL_CONTROL``
(lines ``key=value``, see the C file's header) unplugs it, makes transfers short or retunes
fail. pyrtlsdr opens ``$LD_LIBRARY_PATH/librtlsdr.so`` first, so pointing ``LD_LIBRARY_PATH``
at the folder :func:`build_library` returns is all a process needs.

In a subprocess::

    env = {**os.environ, **emulator_env(lib_dir, control)}
    subprocess.run([...,"run", "--source", "rtlsdr", ...], env=env)
    set_control(control, present=0)          # unplug, while it runs

In-process, use :func:`use_emulator` (or the fixture :func:`fakertl`), which sets the
environment with pytest's ``monkeypatch`` (undone after the test: other tests and their
subprocesses expect librtlsdr to be missing) and drops any cached ``rtlsdr`` modules before
and after, so the next ``import rtlsdr`` loads whatever the environment then says.
"""

from __future__ import annotations

import ctypes
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

#: The emulated dongle's serial number.
SERIAL = "SPF00001"
#: Default sky frequency of the emulated tone, Hz (the C file's ``tone_hz`` default).
TONE_HZ = 1420.0e6
#: Control keys the C library reads, with their defaults.
CONTROL_DEFAULTS = {"present": 1, "short": 0, "retune_fail": 0, "unplug_rc": -5,
                    "tone_hz": TONE_HZ, "tone_amp": 1.5, "noise_rms": 3.0, "counter": 0,
                    "stall": 0}

_SOURCE = Path(__file__).with_name("fake_librtlsdr.c")
_built: dict[str, Path] = {}


def build_library(tmp_dir) -> Path:
    """Compile the emulator into ``tmp_dir/librtlsdr.so``; return the folder.

    Raises
    ------
    RuntimeError
        No C compiler ``cc`` on the PATH, or the compilation failed (its output attached).
    """
    cc = shutil.which("cc")
    if cc is None:
        raise RuntimeError("the librtlsdr emulator needs a C compiler: no 'cc' on the PATH "
                           "(install gcc, e.g. 'apt-get install gcc')")
    folder = Path(tmp_dir)
    folder.mkdir(parents=True, exist_ok=True)
    out = folder / "librtlsdr.so"
    cmd = [cc, "-O2", "-shared", "-fPIC", "-pthread", "-o", str(out), str(_SOURCE), "-lm"]
    r = subprocess.run(cmd, capture_output=True, text=True)
    if r.returncode != 0:
        raise RuntimeError(f"building the librtlsdr emulator failed ({' '.join(cmd)}): "
                           f"{r.stderr.strip()}")
    return folder


def build_once(tmp_path_factory=None) -> Path:
    """:func:`build_library` once per process (into a pytest temp folder when given)."""
    if "lib" not in _built:
        base = (tmp_path_factory.mktemp("fakertl") if tmp_path_factory is not None
                else Path(tempfile.mkdtemp(prefix="fakertl-")))
        _built["lib"] = build_library(base)
    return _built["lib"]


def emulator_env(lib_dir, control_path) -> dict:
    """The two variables a process needs to use the emulator: ``LD_LIBRARY_PATH`` (the
    emulator's folder first, then whatever this process had) and ``FAKERTL_CONTROL``.
    Merge into a full environment for a subprocess: ``{**os.environ, **emulator_env(...)}``."""
    old = os.environ.get("LD_LIBRARY_PATH", "")
    return {"LD_LIBRARY_PATH": str(lib_dir) + (":" + old if old else ""),
            "FAKERTL_CONTROL": str(control_path)}


def read_control(path) -> dict:
    """The control file's keys (the defaults for keys it does not set)."""
    keys = dict(CONTROL_DEFAULTS)
    p = Path(path)
    if p.exists():
        for line in p.read_text().splitlines():
            if "=" in line and not line.startswith("#"):
                k, v = line.split("=", 1)
                keys[k.strip()] = v.strip()
    return keys


def set_control(path, **keys) -> None:
    """Change some control keys, keeping the others; the file is replaced atomically.

    Booleans are written as 0 / 1. An unknown key raises ValueError naming the allowed ones.
    """
    bad = set(keys) - set(CONTROL_DEFAULTS)
    if bad:
        raise ValueError(f"unknown emulator control key(s) {sorted(bad)}: allowed are "
                         + ", ".join(CONTROL_DEFAULTS))
    merged = read_control(path)
    merged.update({k: int(v) if isinstance(v, bool) else v for k, v in keys.items()})
    p = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=".fakertl-", dir=p.parent)
    with os.fdopen(fd, "w") as f:
        f.write("".join(f"{k}={v}\n" for k, v in merged.items()))
    os.replace(tmp, p)                  # a new inode: the library notices at its next look


def forget_rtlsdr() -> None:
    """Drop cached ``rtlsdr`` modules: the next ``import rtlsdr`` looks for librtlsdr again."""
    for name in [m for m in sys.modules if m == "rtlsdr" or m.startswith("rtlsdr.")]:
        del sys.modules[name]


class Emulator:
    """The emulator in this process: its control file and its test hooks.

    Attributes
    ----------
    lib_dir : Path, the folder holding librtlsdr.so
    control : Path, the control file
    lib : ctypes.CDLL, the loaded emulator (the same one pyrtlsdr uses)
    """

    def __init__(self, lib_dir: Path, control: Path):
        self.lib_dir, self.control = Path(lib_dir), Path(control)
        self.lib = ctypes.CDLL(str(self.lib_dir / "librtlsdr.so"))
        self.lib.fakertl_stat.restype = ctypes.c_longlong
        self.lib.fakertl_stat.argtypes = [ctypes.c_char_p]
        self.lib.fakertl_tunes.restype = ctypes.c_int
        self.lib.fakertl_tunes.argtypes = [ctypes.POINTER(ctypes.c_uint32), ctypes.c_int]
        self.lib.fakertl_reset.restype = None

    def set(self, **keys) -> None:
        """:func:`set_control` on this emulator's control file."""
        set_control(self.control, **keys)

    def stat(self, name: str) -> int:
        """A counter of the library (see ``fakertl_stat`` in the C file)."""
        v = self.lib.fakertl_stat(name.encode())
        if v < 0 and name != "bias_tee":
            raise ValueError(f"unknown emulator counter {name!r}")
        return int(v)

    def tunes(self) -> list[int]:
        """Centre frequencies set successfully since the last reset, Hz, oldest first."""
        n = self.lib.fakertl_tunes(None, 0)
        buf = (ctypes.c_uint32 * max(1, min(n, 8192)))()
        self.lib.fakertl_tunes(buf, len(buf))
        return list(buf[: min(n, 8192)])

    def reset(self) -> None:
        self.lib.fakertl_reset()


def use_emulator(lib_dir, control_path, monkeypatch) -> Emulator:
    """Point this process at the emulator for one test (undone by ``monkeypatch``).

    Sets ``LD_LIBRARY_PATH`` and ``FAKERTL_CONTROL`` with ``monkeypatch.setenv`` and drops
    cached ``rtlsdr`` modules, so that pyrtlsdr loads the emulator at its next import. Call
    :func:`forget_rtlsdr` when done (the :func:`fakertl` fixture does), before monkeypatch
    restores the environment, so that later tests load the real library or fail to.
    """
    for k, v in emulator_env(lib_dir, control_path).items():
        monkeypatch.setenv(k, v)
    forget_rtlsdr()
    emu = Emulator(lib_dir, control_path)
    emu.reset()
    return emu


@pytest.fixture(scope="session")
def fakertl_lib(tmp_path_factory) -> Path:
    """The folder holding the emulated librtlsdr.so, built once per session."""
    return build_once(tmp_path_factory)


@pytest.fixture
def fakertl(fakertl_lib, tmp_path, monkeypatch):
    """An :class:`Emulator` for one test, with its own control file (all defaults: present).

    Import both fixtures into a test module: ``from rtlsdr_emulator import fakertl,
    fakertl_lib``.
    """
    control = tmp_path / "fakertl.control"
    set_control(control)
    emu = use_emulator(fakertl_lib, control, monkeypatch)
    yield emu
    forget_rtlsdr()
