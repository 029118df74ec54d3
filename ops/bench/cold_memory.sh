#!/usr/bin/env bash
# Memory of a cold retrain against the size of the store, with the real
# binary, and the holdout loss of streamed against in-memory cold runs.
#
# Run: bash ops/bench/cold_memory.sh [SIZES...]   (default: 1000000 5000000 20000000)
#
# Part 1. For each store size N (rows of the 12-column synthetic stream of
# examples/gen_stream.rs, ingested in files of 1M rows), one cold retrain
# (`tidegate retrain --dry-run`: the first cycle of a store trains cold
# only; a dry run trains, scores and judges but records nothing) with
# `[memory] cycle_mb = BUDGET_MB`, timed and measured for peak RSS
# (/usr/bin/time -v). The bound is 1.5 x the budget + 200 MB (the shape of
# the cycle target: 1.5 x the bytes the cycle must hold + 200 MB; a
# streamed cycle must hold its budget). Printed per size: the store's
# cells against the budget, peak RSS, its ratio to the bound and to the
# smallest store's peak (same run). At the smallest size the same retrain
# also runs with every row held (cycle_mb = 65536), as the reference.
#
# Part 2. Holdout loss, streamed against held, over SEEDS seeds of
# [training] seed on a store of LOSS_ROWS rows with the default training
# settings (early stopping on): per seed the cold candidate's mean holdout
# loss with every row held and streamed within LOSS_BUDGET_MB; then mean,
# sd and range of each, and of the per-seed ratio streamed / held.
#
# Env: BUDGET_MB (default 128), EPOCHS (cold epochs in part 1, default 2),
# LOSS_ROWS (default 200000), LOSS_BUDGET_MB (default 8), SEEDS (default 5;
# 0 skips part 2), CARGO_TARGET_DIR, WORK (scratch dir, default a new temp
# dir, removed at the end unless KEEP=1).
set -euo pipefail

cd "$(dirname "$0")/../.."
SIZES=("$@")
[ ${#SIZES[@]} -gt 0 ] || SIZES=(1000000 5000000 20000000)
BUDGET_MB=${BUDGET_MB:-128}
EPOCHS=${EPOCHS:-2}
LOSS_ROWS=${LOSS_ROWS:-200000}
LOSS_BUDGET_MB=${LOSS_BUDGET_MB:-8}
SEEDS=${SEEDS:-5}
COLS=12

cargo build --release --quiet --bin tidegate --example gen_stream
TARGET=${CARGO_TARGET_DIR:-target}
TG="$TARGET/release/tidegate"
GEN="$TARGET/release/examples/gen_stream"
WORK=${WORK:-$(mktemp -d /tmp/tidegate-cold.XXXXXX)}
mkdir -p "$WORK"

now() { date +%s.%N; }
rss_mb() { awk -F': ' '/Maximum resident set size/ {printf "%.0f", $2 / 1024}' "$1"; }
# `fill DIR N`: a state dir in DIR holding N rows, ingested in files of 1M.
fill() {
  local d=$1 n=$2 start=0 k
  rm -rf "$d"
  mkdir -p "$d"
  "$GEN" config > "$d/plain.toml"
  "$TG" -q --state "$d/state" --config "$d/plain.toml" init
  while [ "$start" -lt "$n" ]; do
    k=$((n - start < 1000000 ? n - start : 1000000))
    "$GEN" csv "$d/part.csv" "$start" "$k"
    "$TG" -q --state "$d/state" --config "$d/plain.toml" ingest "$d/part.csv" > /dev/null
    rm -f "$d/part.csv"
    start=$((start + k))
  done
}
# `cold DIR NAME EXTRA_TOML`: a timed dry-run cold retrain; sets SECS, RSS, LOSS, HOW.
cold() {
  local d=$1 name=$2 extra=$3 t0
  "$GEN" config "$extra" > "$d/$name.toml"
  t0=$(now)
  /usr/bin/time -v -o "$d/$name.time" "$TG" -v --json --state "$d/state" --config "$d/$name.toml" \
    retrain --dry-run > "$d/$name.out" 2> "$d/$name.err"
  SECS=$(awk -v a="$t0" -v b="$(now)" 'BEGIN {printf "%.1f", b - a}')
  RSS=$(rss_mb "$d/$name.time")
  LOSS=$(sed -n 's/.*"holdout_loss":\([0-9.eE+-]*\).*/\1/p' "$d/$name.out" | head -1)
  if grep -q 'the cold candidate streams' "$d/$name.err"; then
    HOW=$(sed -n 's/.*memory budget [0-9.]* MiB): \(.*\)/\1/p' "$d/$name.err" | head -1)
    HOW="streamed ($HOW)"
  else
    HOW="held"
  fi
}

echo "cold retrain memory: sizes ${SIZES[*]}, budget $BUDGET_MB MiB, $EPOCHS epochs, $(nproc) cores"
echo "load before: $(uptime)"
BOUND=$(awk -v b="$BUDGET_MB" 'BEGIN {printf "%.0f", 1.5 * b * 1.048576 + 200}')
echo
printf '%-10s %-9s %-8s %-8s %-9s %-9s %-10s %-10s %s\n' \
  "rows" "cells MB" "/budget" "secs" "peak MB" "bound MB" "peak/bound" "peak/first" "holdout loss, how"
FIRST=""
for N in "${SIZES[@]}"; do
  D="$WORK/$N"
  fill "$D" "$N"
  cells=$(awk -v n="$N" -v c="$COLS" 'BEGIN {printf "%.0f", n * c * 4 / 1e6}')
  over=$(awk -v m="$cells" -v b="$BUDGET_MB" 'BEGIN {printf "%.1f", m / (b * 1.048576)}')
  if [ -z "$FIRST" ]; then
    cold "$D" held "[training]\ncold_epochs = $EPOCHS\n[memory]\ncycle_mb = 65536\n"
    printf '%-10s %-9s %-8s %-8s %-9s %-9s %-10s %-10s %s\n' "$N" "$cells" "-" "$SECS" "$RSS" "-" "-" "-" \
      "$LOSS, $HOW (reference)"
  fi
  cold "$D" streamed "[training]\ncold_epochs = $EPOCHS\n[memory]\ncycle_mb = $BUDGET_MB\n"
  [ -n "$FIRST" ] || FIRST=$RSS
  printf '%-10s %-9s %-8s %-8s %-9s %-9s %-10s %-10s %s\n' "$N" "$cells" "$over" "$SECS" "$RSS" "$BOUND" \
    "$(awk -v r="$RSS" -v b="$BOUND" 'BEGIN {printf "%.2f", r / b}')" \
    "$(awk -v r="$RSS" -v f="$FIRST" 'BEGIN {printf "%.2f", r / f}')" "$LOSS, $HOW"
  grep -E 'cycle [0-9]+: (read|trained|scored)' "$D/streamed.err" | sed 's/^ *DEBUG */    /'
  [ "${KEEP:-0}" = 1 ] || rm -rf "$D"
done

if [ "$SEEDS" -gt 0 ]; then
  echo
  echo "holdout loss, cold candidate, $LOSS_ROWS rows, default training settings; streamed within $LOSS_BUDGET_MB MiB"
  D="$WORK/loss"
  fill "$D" "$LOSS_ROWS"
  HELD=()
  STREAMED=()
  for s in $(seq 1 "$SEEDS"); do
    cold "$D" "held-$s" "[training]\nseed = $s\n[memory]\ncycle_mb = 65536\n"
    h=$LOSS
    hs=$SECS
    cold "$D" "streamed-$s" "[training]\nseed = $s\n[memory]\ncycle_mb = $LOSS_BUDGET_MB\n"
    case "$HOW" in streamed*) ;; *) echo "seed $s: the small budget did not stream"; exit 1 ;; esac
    echo "seed $s: held $h ($hs s), streamed $LOSS ($SECS s), ratio $(awk -v a="$LOSS" -v b="$h" 'BEGIN {printf "%.4f", a / b}')"
    HELD+=("$h")
    STREAMED+=("$LOSS")
  done
  stats() { printf '%s\n' "$@" | awk '{s += $1; q += $1 * $1; if (NR == 1 || $1 < lo) lo = $1; if (NR == 1 || $1 > hi) hi = $1}
    END {m = s / NR; v = (NR > 1) ? (q - NR * m * m) / (NR - 1) : 0; if (v < 0) v = 0;
         printf "mean %.5f, sd %.5f, range %.5f-%.5f", m, sqrt(v), lo, hi}'; }
  RATIOS=()
  for i in "${!HELD[@]}"; do
    RATIOS+=("$(awk -v a="${STREAMED[$i]}" -v b="${HELD[$i]}" 'BEGIN {printf "%.6f", a / b}')")
  done
  echo "held:     $(stats "${HELD[@]}")"
  echo "streamed: $(stats "${STREAMED[@]}")"
  echo "streamed / held per seed: $(stats "${RATIOS[@]}")"
  [ "${KEEP:-0}" = 1 ] || rm -rf "$D"
fi
echo "load after: $(uptime)"
[ "${KEEP:-0}" = 1 ] || rm -rf "$WORK"
