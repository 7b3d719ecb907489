#!/usr/bin/env bash
# Set up, then run the whole test suite on two workers (pytest-xdist; a module's tests stay on
# one worker, so a module's shared scans are computed once). Options after it go to pytest and
# win over these, e.g. `bash scripts/test.sh -n 0 tests/test_run.py` for one file, serially.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
exec .venv/bin/python -m pytest -q -n 2 --dist loadscope "$@"
