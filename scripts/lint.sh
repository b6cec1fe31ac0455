#!/usr/bin/env bash
# Lint with ruff (errors, imports, modern syntax) and check formatting of nothing else.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
.venv/bin/ruff check codeseek tests scripts
