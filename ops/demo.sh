#!/usr/bin/env bash
# Runs the bundled bakery demo (invented data) end to end from the CLI: a
# fresh state dir, the nightly files ingested in order (one is refused and
# explained, one is a duplicate, a new shop opens, demand shifts), a retrain
# cycle after each few nights with the gate's decision, then predictions,
# the model list, the audit trail and a full verify.
# Usage: bash ops/demo.sh [STATE_DIR]
set -euo pipefail
cd "$(dirname "$0")/.."
state="${1:-$(mktemp -d)/state}"
bin="${TIDEGATE_BIN:-}"
if [ -z "$bin" ]; then
  cargo build --release --quiet
  bin="${CARGO_TARGET_DIR:-target}/release/tidegate"
fi
run() { echo; echo "\$ tidegate $*"; "$bin" --state "$state" "$@"; }

"$bin" --state "$state" --config demo-data/tidegate.toml init
run ingest demo-data/night-01.csv demo-data/night-02.csv demo-data/night-03.csv demo-data/night-04.csv
run retrain
# Exit code 65 means "a file was refused": expected here (night-05).
run ingest demo-data/night-05.csv demo-data/night-06.csv demo-data/night-07.csv || [ $? -eq 65 ]
run retrain
run ingest demo-data/night-08.csv demo-data/night-09.csv demo-data/night-09.resent.csv demo-data/night-10.csv
run retrain --cold
run ingest demo-data/night-11.csv demo-data/night-12.csv
run retrain
run models
run log --kind batch-refused,batch-duplicate,promoted,shelved
echo; echo "\$ tidegate predict --input demo-data/night-12.csv | head -4"
"$bin" --state "$state" predict --input demo-data/night-12.csv | head -4
run verify
echo
echo "state dir: $state"
echo "reasons for the refused file: $state/refused/night-05.csv.why.json"
