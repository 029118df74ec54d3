#!/usr/bin/env bash
# Long crash runs: the daemon kill loop and the ingest kill loop of the test
# suite with many kills (default 1000 each), printing their counts: kills at
# random moments, kills at each named failpoint, files and rows published,
# stored, lost and doubled. A run fails if any invariant breaks.
#
#   bash ops/crash-soak.sh [KILLS]
#
# CI runs the same tests with a short default count.
set -euo pipefail
kills="${1:-1000}"
case "$kills" in
  '' | *[!0-9]*) echo "usage: $0 [KILLS]  (a whole number, default 1000)" >&2; exit 2 ;;
esac
cd "$(dirname "$0")/.."
start=$(date +%s)
TIDEGATE_SOAK_KILLS="$kills" cargo test --release --test it -- \
  --exact daemon::killed_daemons_never_lose_or_double_a_file \
  crash::killed_ingests_never_lose_or_double_rows \
  --nocapture --test-threads 1
echo "crash soak: $kills kills per test, $(( $(date +%s) - start )) s wall time"
