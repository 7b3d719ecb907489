#!/usr/bin/env bash
# Set up spinflip in a virtual environment (.venv) on Debian / Raspberry Pi OS, Python >= 3.11.
# Idempotent: a second run only checks. Installs python3-venv, tmux, gcc and libhamlib-utils with
# apt-get when missing (tmux, gcc and libhamlib-utils only for the tests).
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}
if ! command -v "$PY" >/dev/null; then
  echo "setup: $PY not found: install Python >= 3.11 (sudo apt-get install python3)" >&2; exit 2
fi
if ! "$PY" -c 'import sys; sys.exit(sys.version_info < (3, 11))'; then
  echo "setup: $($PY --version) is too old: spinflip needs Python >= 3.11" >&2; exit 2
fi
if [ ! -x .venv/bin/python ]; then
  if ! "$PY" -m venv .venv 2>/dev/null; then
    rm -rf .venv
    echo "setup: installing python3-venv with apt-get" >&2
    SUDO=""; [ "$(id -u)" -ne 0 ] && SUDO="sudo"
    $SUDO apt-get update -qq && $SUDO apt-get install -y -qq python3-venv
    "$PY" -m venv .venv
  fi
fi
if ! command -v tmux >/dev/null && command -v apt-get >/dev/null; then
  echo "setup: installing tmux with apt-get (the terminal UI's tests drive it)" >&2
  SUDO=""; [ "$(id -u)" -ne 0 ] && SUDO="sudo"
  { $SUDO apt-get update -qq && $SUDO apt-get install -y -qq tmux; } \
    || echo "setup: could not install tmux: tests/test_tui_live.py will fail without it" >&2
fi
if ! command -v cc >/dev/null && command -v apt-get >/dev/null; then
  echo "setup: installing gcc with apt-get (the tests build an emulated librtlsdr with it)" >&2
  SUDO=""; [ "$(id -u)" -ne 0 ] && SUDO="sudo"
  { $SUDO apt-get update -qq && $SUDO apt-get install -y -qq gcc libc6-dev; } \
    || echo "setup: could not install gcc: tests/test_rtlsdr_emulated.py will fail without it" >&2
fi
if ! command -v rotctld >/dev/null && command -v apt-get >/dev/null; then
  echo "setup: installing libhamlib-utils with apt-get (the pointing tests drive its rotctld)" >&2
  SUDO=""; [ "$(id -u)" -ne 0 ] && SUDO="sudo"
  { $SUDO apt-get update -qq && $SUDO apt-get install -y -qq libhamlib-utils; } \
    || echo "setup: could not install libhamlib-utils: tests/test_mount.py will fail without rotctld" >&2
fi
stamp=.venv/.spinflip-installed
if [ ! -f "$stamp" ] || [ pyproject.toml -nt "$stamp" ]; then
  .venv/bin/python -m pip install -q --upgrade pip
  .venv/bin/python -m pip install -q -e '.[test]'
  touch "$stamp"
fi
