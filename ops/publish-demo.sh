#!/usr/bin/env bash
# Publishes the bakery demo's nightly files into a running daemon's inbox,
# one by one, the way a producer should: write under inbox/.tmp/, then
# rename into the inbox (a rename is atomic, so no half file is ever seen).
# Start the daemon first, e.g.:
#   tidegate --state /tmp/bakery/state --config demo-data/tidegate.toml init
#   tidegate --state /tmp/bakery/state watch &
# Usage: bash ops/publish-demo.sh STATE_DIR [SECONDS_BETWEEN_FILES]
set -euo pipefail
cd "$(dirname "$0")/.."
state="${1:?usage: publish-demo.sh STATE_DIR [SECONDS_BETWEEN_FILES]}"
pause="${2:-10}"
inbox="$state/inbox"
mkdir -p "$inbox/.tmp"
for f in demo-data/night-*.csv; do
  name="$(basename "$f")"
  cp "$f" "$inbox/.tmp/$name"
  mv "$inbox/.tmp/$name" "$inbox/$name"
  echo "published $name"
  sleep "$pause"
done
