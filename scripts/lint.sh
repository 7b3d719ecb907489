#!/usr/bin/env bash
# ruff and mypy over the package (run by .ci/run before the tests). The package's folders
# (pkg/, daemon/, tui/, reduce/) map onto spinflip through setuptools' package-dir, which mypy cannot
# follow, so it checks a tree of symbolic links in .lint/ that mirrors the import names.
set -euo pipefail
cd "$(dirname "$0")/.."
.venv/bin/ruff check daemon tui reduce pkg tests scripts
rm -rf .lint && mkdir -p .lint/spinflip
for f in pkg/*.py; do ln -s "../../$f" ".lint/spinflip/$(basename "$f")"; done
ln -s ../../daemon .lint/spinflip/daemon
ln -s ../../tui .lint/spinflip/tui
ln -s ../../reduce .lint/spinflip/reduce
(cd .lint && ../.venv/bin/mypy --config-file ../pyproject.toml -p spinflip)
