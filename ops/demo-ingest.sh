#!/usr/bin/env bash
# Runs the bundled bakery demo through the intake path: a fresh state dir in
# a temp folder, every nightly file ingested in order (one is refused and
# explained, one is a duplicate), then the status and the audit log.
# Usage: bash ops/demo-ingest.sh [STATE_DIR]
set -euo pipefail
cd "$(dirname "$0")/.."
state="${1:-$(mktemp -d)/state}"
cargo build --release --quiet
bin=${CARGO_TARGET_DIR:-target}/release/tidegate
"$bin" --state "$state" --config demo-data/tidegate.toml init
# Exit code 65 means "some file was refused": expected here (night-05).
"$bin" --state "$state" ingest demo-data/night-*.csv || [ $? -eq 65 ]
echo
"$bin" --state "$state" status
echo
"$bin" --state "$state" log --kind batch-rejected,batch-duplicate
echo
echo "state dir: $state"
echo "reasons for the refused file: $state/rejected/night-05.csv.why.json"
