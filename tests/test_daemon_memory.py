"""What bounds the daemon's memory: the reader's queue sized in time, glibc's malloc arenas
capped (daemon/run/heap.py), and the modules every command imports."""

import os
import subprocess
import sys

from spinflip.daemon.run import heap
from spinflip.daemon.run.observation import _QUEUE_SECONDS, queue_blocks


def test_queue_holds_about_the_same_time_at_any_rate():
    for rate, block in ((2.4e6, 262144), (3.2e6, 262144), (1.0e6, 16384), (2.4e6, 4194304)):
        n = queue_blocks(block / rate)
        assert n >= 2
        if n > 2:
            assert abs(n * block / rate - _QUEUE_SECONDS) <= 0.5 * block / rate
    assert queue_blocks(262144 / 2.4e6) == 8      # the default source: 0.87 s


def test_malloc_arenas_capped_unless_the_user_chose(monkeypatch):
    monkeypatch.setenv("MALLOC_ARENA_MAX", "4")
    assert heap.limit_malloc_arenas() is False     # the user's setting wins
    monkeypatch.delenv("MALLOC_ARENA_MAX")
    try:
        os.confstr("CS_GNU_LIBC_VERSION")
    except ValueError:
        assert heap.limit_malloc_arenas() is False     # not glibc: nothing to do
    else:
        assert heap.limit_malloc_arenas() is True      # mallopt(3) accepted M_ARENA_MAX


def test_large_blocks_mapped_unless_the_user_chose(monkeypatch):
    monkeypatch.setenv("MALLOC_MMAP_THRESHOLD_", "65536")
    assert heap.map_large_blocks() is False         # the user's setting wins
    monkeypatch.delenv("MALLOC_MMAP_THRESHOLD_")
    try:
        os.confstr("CS_GNU_LIBC_VERSION")
    except ValueError:
        assert heap.map_large_blocks() is False     # not glibc: nothing to do
    else:
        assert heap.map_large_blocks() is True      # mallopt(3) accepted M_MMAP_THRESHOLD


def test_every_commands_path_imports_no_numerical_library():
    """``spinflip --help``, ``ctl`` and the parser import no numpy, scipy, astropy or rich."""
    code = ("import sys, spinflip.cli; "
            "print(' '.join(m for m in ('numpy', 'scipy', 'astropy', 'rich', 'zmq', "
            "'matplotlib') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=60, check=True).stdout.strip()
    assert out == ""

