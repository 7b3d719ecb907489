#!/usr/bin/env bash
# Quick start: set up, then watch 60 s of simulated sky in the terminal UI, then summarise the scan.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
.venv/bin/spinflip demo --seconds 60 --out spinflip-data "$@"
for f in $(ls -t spinflip-data/*.fits | head -1); do .venv/bin/spinflip inspect "$f"; done
