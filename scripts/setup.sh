#!/usr/bin/env bash
# Create .venv and install codeseek with its dev tools. Idempotent: a second run
# with an unchanged pyproject.toml and constraints.txt does nothing.
set -euo pipefail
cd "$(dirname "$0")/.."
PYTHON="${PYTHON:-python3}"
# Test tools: git (the reference for ignore rules), Universal Ctags (the
# reference the language tests check extraction against, tests/test_ctags.py),
# npm (fetches their npm corpora, tests/corpora.py) and tmux (the terminal test
# of `codeseek ui`). Installed with apt-get when running as root (as CI does);
# otherwise say how: those tests skip without them.
missing=()
command -v git >/dev/null 2>&1 || missing+=(git)
command -v tmux >/dev/null 2>&1 || missing+=(tmux)
ctags_version="$(ctags --version 2>/dev/null || true)"
[[ "$ctags_version" == *"Universal Ctags"* ]] || missing+=(universal-ctags)
command -v npm >/dev/null 2>&1 || missing+=(npm)
if [ "${#missing[@]}" -gt 0 ]; then
    if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then
        echo "setup: installing ${missing[*]}" >&2
        export DEBIAN_FRONTEND=noninteractive
        apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null \
            || { apt-get update -qq \
                 && apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null; }
    else
        echo "setup: ${missing[*]} not installed; the language tests that need them will skip." >&2
        echo "setup: install with: sudo apt-get install ${missing[*]}" >&2
    fi
fi
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
# the extras the tests need: dev tools, mcp for `codeseek mcp` (tests/test_mcp.py),
# ray for `codeseek index --ray` (tests/test_ray.py) and static for the distilled tier
EXTRAS="dev,mcp,ray,static"
.venv/bin/python -m pip install --quiet -c constraints.txt -e ".[$EXTRAS]"
rm -f .venv/.codeseek-setup-*
touch "$stamp"
echo "setup: done" >&2
