#!/usr/bin/env bash
# make bench-core: the core observe path against scikit-learn
# MiniBatchKMeans.partial_fit on the same 2,000,000 vectors (d=16, K=32).
set -euo pipefail
top=$(cd "$(dirname "$0")/../.." && pwd)
cd "$top"
build=${BUILD:-build}
n=${BENCH_N:-2000000}
d=${BENCH_DIM:-16}
k=${BENCH_K:-32}
mkdir -p "$build/bench"
vec="$build/bench/core-vectors-d$d.f64"
core_line=$("$build/tests/bench/core_bench" --n "$n" --dim "$d" --k "$k" --dump "$vec")
echo "$core_line"
sk_line=$(build/venv/bin/python tests/bench/sklearn_minibatch.py "$vec" "$d" "$k")
echo "$sk_line"
core=$(sed -n 's/.*core_observe_per_s=\([0-9]*\).*/\1/p' <<<"$core_line")
sk=$(sed -n 's/.*sklearn_minibatch_per_s=\([0-9]*\).*/\1/p' <<<"$sk_line")
ratio=$(awk -v a="$core" -v b="$sk" 'BEGIN { printf "%.2f", a / b }')
echo "core_vs_sklearn_minibatch=$ratio"
target=$(awk -v a="$core" 'BEGIN { print (a >= 1000000) ? "met" : "not met" }')
echo "target core_observe_per_s >= 1000000: $target"
rm -f "$vec"
