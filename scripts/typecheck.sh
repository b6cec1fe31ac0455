#!/usr/bin/env bash
# Type-check the package with mypy (settings in pyproject.toml).
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
.venv/bin/mypy
