#!/usr/bin/env bash
# The main job on sample_repo/: set up, index it, then run a few searches.
# The index goes to a temporary folder so the checkout stays clean.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
index_dir="$(mktemp -d)"
trap 'rm -rf "$index_dir"' EXIT
cs() { .venv/bin/codeseek "$@" --index-dir "$index_dir"; }
cs index sample_repo
for query in \
    "where do we retry failed uploads" \
    "work out how much a rider pays for a trip" \
    "decode the status packet a dock sends"; do
    echo
    echo "\$ codeseek search \"$query\" -k 3"
    cs search "$query" --repo sample_repo -k 3
done
