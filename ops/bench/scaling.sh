#!/usr/bin/env bash
# Cycle latency and scaling with the real binary.
#
# Run: bash ops/bench/scaling.sh [SIZES...]     (default: 100000 1000000 5000000)
#
# For each store size N (rows of the 12-column synthetic stream written by
# examples/gen_stream.rs), a state dir is filled with N rows and given a
# first model (a one-epoch cold run: setup only, not measured). Then a file
# of 10,000 new rows goes from drop to logged decision through two
# processes, each timed and measured for peak RSS (/usr/bin/time -v):
#   intake: `tidegate ingest FILE`  (parse, store, drift report, fresh-data check)
#   cycle:  `tidegate retrain`      (warm candidate, scoring, baselines, gate, record)
# both with the default training settings. Printed per size: wall seconds,
# peak RSS against its target (1.5 x the f32 size of the rows the process
# needs + 200 MB), the cycle's steps (from `-v`), and ratios of the cycle
# time at each size to the smallest size in the same run, beside the
# store-size ratio. Last, examples/bench_store_read.rs times reading every
# stored training row against reading a 50,000-row sample of them.
#
# Env: CARGO_TARGET_DIR (build dir, default ./target), WORK (scratch dir,
# default a new temp dir, removed at the end unless KEEP=1).
set -euo pipefail

cd "$(dirname "$0")/../.."
SIZES=("$@")
[ ${#SIZES[@]} -gt 0 ] || SIZES=(100000 1000000 5000000)
NEW_ROWS=10000
COLS=12
# Rows a drift report compares against (the config default of
# drift.max_reference_rows), counted as rows intake needs.
DRIFT_REF=20000

cargo build --release --quiet --bin tidegate --example gen_stream --example bench_store_read
TARGET=${CARGO_TARGET_DIR:-target}
TG="$TARGET/release/tidegate"
GEN="$TARGET/release/examples/gen_stream"
READ="$TARGET/release/examples/bench_store_read"
WORK=${WORK:-$(mktemp -d /tmp/tidegate-scaling.XXXXXX)}
mkdir -p "$WORK"

now() { date +%s.%N; }
# peak RSS in MB from a /usr/bin/time -v report
rss_mb() { awk -F': ' '/Maximum resident set size/ {printf "%.0f", $2 / 1024}' "$1"; }
mb() { awk -v r="$1" -v c="$COLS" 'BEGIN {printf "%.1f", r * c * 4 / 1e6}'; }

echo "scaling: sizes ${SIZES[*]}, $NEW_ROWS new rows per file, $(nproc) cores"
echo "load before: $(uptime)"
declare -A CYCLE_S INTAKE_S
for N in "${SIZES[@]}"; do
  D="$WORK/$N"
  rm -rf "$D"
  mkdir -p "$D"
  "$GEN" config '[training]\ncold_epochs = 1\npatience = 0\n' > "$D/setup.toml"
  "$GEN" config > "$D/run.toml"
  S="$D/state"
  "$TG" -q --state "$S" --config "$D/setup.toml" init
  t0=$(now)
  start=0
  while [ "$start" -lt "$N" ]; do
    n=$((N - start < 1000000 ? N - start : 1000000))
    "$GEN" csv "$D/base-$start.csv" "$start" "$n"
    "$TG" -q --state "$S" --config "$D/setup.toml" ingest "$D/base-$start.csv" > /dev/null
    rm -f "$D/base-$start.csv"
    start=$((start + n))
  done
  "$TG" -q --state "$S" --config "$D/setup.toml" retrain > /dev/null
  setup_s=$(awk -v a="$t0" -v b="$(now)" 'BEGIN {printf "%.1f", b - a}')
  "$GEN" csv "$D/new.csv" "$N" "$NEW_ROWS"

  t0=$(now)
  /usr/bin/time -v -o "$D/ingest.time" "$TG" -v --state "$S" --config "$D/run.toml" \
    ingest "$D/new.csv" > "$D/ingest.out" 2> "$D/ingest.err"
  t1=$(now)
  /usr/bin/time -v -o "$D/retrain.time" "$TG" -v --state "$S" --config "$D/run.toml" \
    retrain > "$D/retrain.out" 2> "$D/retrain.err"
  t2=$(now)
  in_s=$(awk -v a="$t0" -v b="$t1" 'BEGIN {printf "%.2f", b - a}')
  cy_s=$(awk -v a="$t1" -v b="$t2" 'BEGIN {printf "%.2f", b - a}')
  INTAKE_S[$N]=$in_s
  CYCLE_S[$N]=$cy_s

  # Rows each process needs: intake the new file, the drift reference and
  # the fresh-data check's reference; the cycle its new and older training
  # rows and every holdout row (from its own -v report).
  fresh_ref=$(sed -n 's/.*fresh-data check read \([0-9]*\) reference rows.*/\1/p' "$D/ingest.err" | head -1)
  fresh_ref=${fresh_ref:-0}
  drift_ref=$((N * 8 / 10 < DRIFT_REF ? N * 8 / 10 : DRIFT_REF))
  in_rows=$((NEW_ROWS + drift_ref + fresh_ref))
  read_line=$(grep -o 'read [0-9]* new and [0-9]* of [0-9]* older training rows.*holdout rows in [0-9.]* s' "$D/retrain.err" | head -1)
  cy_rows=$(echo "$read_line" | awk '{print $2 + $5 + $(NF-5)}')
  in_rss=$(rss_mb "$D/ingest.time")
  cy_rss=$(rss_mb "$D/retrain.time")
  in_target=$(awk -v r="$in_rows" -v c="$COLS" 'BEGIN {printf "%.0f", 1.5 * r * c * 4 / 1048576 + 200}')
  cy_target=$(awk -v r="$cy_rows" -v c="$COLS" 'BEGIN {printf "%.0f", 1.5 * r * c * 4 / 1048576 + 200}')
  echo
  echo "== store of $N rows (setup: ingest + one-epoch cold model in ${setup_s} s)"
  echo "intake  (ingest $NEW_ROWS rows + drift + fresh check): ${in_s} s, peak RSS ${in_rss} MB | needs $in_rows rows = $(mb "$in_rows") MB f32 -> target <= ${in_target} MB: $([ "$in_rss" -le "$in_target" ] && echo met || echo NOT met)"
  echo "cycle   (tidegate retrain, warm):                  ${cy_s} s, peak RSS ${cy_rss} MB | loads $cy_rows rows = $(mb "$cy_rows") MB f32 -> target <= ${cy_target} MB: $([ "$cy_rss" -le "$cy_target" ] && echo met || echo NOT met)"
  echo "drop to decision: $(awk -v a="$in_s" -v b="$cy_s" 'BEGIN {printf "%.2f", a + b}') s"
  echo "$(grep -m1 -iE 'promot|kept|keep' "$D/retrain.out" || true)"
  echo "steps:"
  grep -E 'fresh-data check read|cycle [0-9]+: ' "$D/ingest.err" "$D/retrain.err" | sed 's/^[^:]*://; s/^ *DEBUG */  /'
  echo "store reads (bench_store_read): $("$READ" "$S")"
done

echo
echo "== ratios against the $((${SIZES[0]})) -row store (same run)"
base=${SIZES[0]}
for N in "${SIZES[@]}"; do
  [ "$N" = "$base" ] && continue
  awk -v n="$N" -v b="$base" -v c="${CYCLE_S[$N]}" -v cb="${CYCLE_S[$base]}" \
    -v i="${INTAKE_S[$N]}" -v ib="${INTAKE_S[$base]}" 'BEGIN {
      printf "store %d/%d = %.0fx: cycle time %.2fx (%.2f s / %.2f s), intake time %.2fx (%.2f s / %.2f s)\n",
        n, b, n / b, c / cb, c, cb, i / ib, i, ib }'
done
echo "load after: $(uptime)"
[ "${KEEP:-0}" = 1 ] || rm -rf "$WORK"
