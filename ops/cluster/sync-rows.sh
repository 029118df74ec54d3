#!/usr/bin/env bash
# Copies a state dir's row files (and archived inputs) to an object store,
# one way, for engines that read the history where it lies. A row file
# never changes once named and its name carries its hash, so copying only
# names the destination lacks is enough. SYNC is your cloud's copy command;
# the default only prints what it would copy.
#   SYNC='aws s3 cp' DEST=s3://bucket/demand ops/cluster/sync-rows.sh state
set -euo pipefail
state=${1:?state dir}
dest=${DEST:?DEST=destination prefix}
sync=${SYNC:-echo would copy}
for dir in rows archive; do
  for f in "$state/$dir"/*; do
    case "$(basename "$f")" in .*|*.tmp) continue ;; esac
    [ -f "$f" ] || continue
    $sync "$f" "$dest/$dir/$(basename "$f")"
  done
done
