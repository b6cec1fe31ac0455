#!/usr/bin/env bash
# The one test command: set up, lint, type-check, then every test tier
# (the fast fake-embedder tests and the tests marked `model`, which use the
# real packaged model). Extra arguments go to pytest, e.g. -m "not model".
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
bash scripts/lint.sh
bash scripts/typecheck.sh
.venv/bin/python -m pytest "$@"
