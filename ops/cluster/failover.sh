#!/usr/bin/env bash
# Failover built on `backup` and `restore` (see README, "Limits, and beyond
# one machine"). Two halves:
#   failover.sh backup STATE BACKUP_ROOT       # on the primary, from a timer
#   failover.sh restore BACKUP_DIR NEW_STATE   # on the standby, after a loss
# After a restore, start `tidegate --state NEW_STATE watch` and re-send every
# input file that arrived since the backup's time (printed below): files
# already stored are recognised by their hash and logged as duplicates.
set -euo pipefail
cmd=${1:?backup or restore}
case "$cmd" in
  backup)
    state=${2:?state dir}; root=${3:?backup root}
    out="$root/$(date -u +%Y-%m-%dT%H%M%SZ)"
    # Routed to the running daemon, which copies between two of its own
    # steps; without a daemon the command takes the state dir itself.
    tidegate --state "$state" backup --out "$out"
    # Copy "$out" off this machine here (object store, another host).
    echo "backup written: $out"
    ;;
  restore)
    from=${2:?backup dir}; state=${3:?new state dir}
    # Checks every file's blake3 against backup.json, then runs verify.
    tidegate --state "$state" restore --from "$from"
    tidegate --state "$state" log --kind backup-made --limit 1
    echo "restored into $state; re-send the files that arrived after the backup above"
    ;;
  *)
    echo "usage: $0 backup STATE BACKUP_ROOT | restore BACKUP_DIR NEW_STATE" >&2
    exit 64
    ;;
esac
