#!/usr/bin/env bash
# Create .venv and install codeseek with its dev tools. Idempotent: a second run
# with an unchanged pyproject.toml and constraints.txt does nothing.
set -euo pipefail
cd "$(dirname "$0")/.."
PYTHON="${PYTHON:-python3}"
if [ ! -x .venv/bin/python ]; then
    echo "setup: creating .venv" >&2
    "$PYTHON" -m venv .venv
fi
stamp=".venv/.codeseek-setup-$(cat pyproject.toml constraints.txt | sha256sum | cut -c1-16)"
if [ -f "$stamp" ]; then
    exit 0
fi
echo "setup: installing codeseek and its dependencies into .venv (a few minutes the first time)" >&2
.venv/bin/python -m pip install --quiet --upgrade pip
# constraints.txt pins torch to the CPU build; see the comment there.
.venv/bin/python -m pip install --quiet -c constraints.txt -e ".[dev]"
rm -f .venv/.codeseek-setup-*
touch "$stamp"
echo "setup: done" >&2
