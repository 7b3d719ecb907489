#!/usr/bin/env bash
# Quick start: set up, then observe for 60 s of simulated time on the built-in telescope.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
.venv/bin/spinflip run --fast --duration 60 --out spinflip-data "$@"
for f in $(ls -t spinflip-data/*.fits | head -1); do .venv/bin/spinflip inspect "$f"; done
