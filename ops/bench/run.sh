#!/usr/bin/env bash
# Every benchmark in one command. Each prints its figures beside a
# reference measured in the same run and their ratio; nothing here is a
# test and nothing here fails on a slow machine.
#
# Run: bash ops/bench/run.sh [quick]    (from anywhere; builds first)
#
#   1. ingest and scoring  examples/bench_ingest.rs  1M rows, 12 columns
#   2. training            examples/bench_train.rs   gemm peak, plain burn loop,
#                                                    batch sizes, allocators,
#                                                    two runs at once, tanh
#   3. warm versus cold    examples/bench_warm.rs    time to quality
#   4. cycle scaling       ops/bench/scaling.sh      100k / 1M / 5M stores, RSS
#   5. gate on 1M rows     examples/bench_gate_rows.rs
#   6. boosted trees       examples/bench_trees.rs   fit + score against ridge,
#                                                    20k and 100k stored rows
#   7. PyTorch peer        ops/bench/peer_pytorch.py (only when torch is installed)
#   8. prediction endpoint tests/it/endpoint.rs `load` (ignored test): requests/s,
#                                                    p50/p99 at 1 and 32 rows, idle and
#                                                    while cycles run and the model moves;
#                      tests/it/onnx.rs `export_time`: the ONNX export against the cycle
#
# Output goes to the terminal and to $OUT (default ops/bench/last-run.txt).
# Figures vary with the machine's load: `uptime` is printed before each
# part. Results worth keeping go to ops/bench/RESULTS.md by hand.
set -euo pipefail
cd "$(dirname "$0")/../.."
MODE=${1:-full}
OUT=${OUT:-ops/bench/last-run.txt}
TARGET=${CARGO_TARGET_DIR:-target}
export CARGO_TARGET_DIR=$TARGET

cargo build --release --examples --bin tidegate

{
  echo "# tidegate benchmarks, $(date -u '+%Y-%m-%d %H:%M UTC'), mode $MODE"
  echo "# $(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2 | xargs), $(nproc) cores, $(free -g | awk '/Mem:/{print $2}') GiB"
  echo "# $(git rev-parse --short HEAD 2>/dev/null || echo 'no git')"
  part() { echo; echo "## $1"; uptime; }

  part "1. ingest and scoring (1,000,000 rows)"
  "$TARGET/release/examples/bench_ingest" 1000000

  part "2. training throughput"
  if [ "$MODE" = quick ]; then
    "$TARGET/release/examples/bench_train" --quick
  else
    "$TARGET/release/examples/bench_train"
  fi

  part "3. warm versus cold"
  "$TARGET/release/examples/bench_warm" quick

  part "4. cycle latency and scaling"
  if [ "$MODE" = quick ]; then
    bash ops/bench/scaling.sh 100000 1000000
  else
    bash ops/bench/scaling.sh
  fi

  part "5. the gate's decision on 1M paired rows"
  "$TARGET/release/examples/bench_gate_rows"

  part "6. the boosted-tree reference model"
  "$TARGET/release/examples/bench_trees"

  part "7. PyTorch peer (optional)"
  python3 ops/bench/peer_pytorch.py || true

  part "8. prediction endpoint on loopback"
  if [ "$MODE" = quick ]; then export TIDEGATE_LOAD_SECONDS=3; fi
  cargo test --release --test it endpoint::load -- --ignored --nocapture
  cargo test --release --test it onnx::export_time -- --ignored --nocapture
} 2>&1 | tee "$OUT"
