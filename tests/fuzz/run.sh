#!/usr/bin/env bash
# Build and run every libFuzzer target tests/fuzz/fuzz_<name>.c.
#
# Convention for a target file (so new targets need no script change):
#   // fuzz-sources: daemon/x.c core/y.c     extra sources to compile in
#   // fuzz-libs: -ljansson -lm               extra libraries to link
#   // fuzz-env: NAME=value ...               environment for its runs
# Its saved corpus lives in tests/fuzz/corpus/<name>/ (read only here);
# inputs found while fuzzing go to $BUILD/fuzz/corpus-<name>/, crashes to
# $BUILD/fuzz/artifacts-<name>/.
#
# Each target is built with clang -fsanitize=fuzzer,address,undefined,
# its saved corpus is replayed (any crash or leak fails), then it is fuzzed
# for FUZZ_SECONDS (default 60).  tests/fuzz/smoke.sh runs this with a short
# time for make test.
set -uo pipefail
top=$(cd "$(dirname "$0")/../.." && pwd)
cd "$top"
BUILD=${BUILD:-build}
secs=${FUZZ_SECONDS:-60}
# Known, bounded upstream leaks only (each entry explains itself).
export LSAN_OPTIONS="suppressions=$top/tests/fuzz/lsan.supp${LSAN_OPTIONS:+:$LSAN_OPTIONS}"
out="$BUILD/fuzz"
mkdir -p "$out"
CLANG=${CLANG:-clang}
cflags=(-g -O1 -std=c11 -D_POSIX_C_SOURCE=200809L -D_DEFAULT_SOURCE -I.
        -fsanitize=fuzzer,address,undefined -fno-sanitize-recover=undefined
        -fno-omit-frame-pointer)

pass=0
failed=()
for src in tests/fuzz/fuzz_*.c; do
    [ -e "$src" ] || continue
    target=$(basename "$src" .c)
    name=${target#fuzz_}
    read -r -a extra_src <<< "$(sed -n 's|^// fuzz-sources:||p' "$src" | head -1)"
    read -r -a extra_libs <<< "$(sed -n 's|^// fuzz-libs:||p' "$src" | head -1)"
    read -r -a extra_env <<< "$(sed -n 's|^// fuzz-env:||p' "$src" | head -1)"
    bin="$out/$target"
    log="$out/$target.log"
    if ! "$CLANG" "${cflags[@]}" -o "$bin" "$src" "${extra_src[@]}" "${extra_libs[@]}" \
            > "$log" 2>&1; then
        echo "  FAIL $target: build (log: $log)"
        tail -20 "$log" | sed 's/^/       /'
        failed+=("$target")
        continue
    fi
    corpus="tests/fuzz/corpus/$name"
    work="$out/corpus-$name"
    artifacts="$out/artifacts-$name/"
    mkdir -p "$work" "$artifacts"
    if [ -d "$corpus" ] && [ -n "$(ls -A "$corpus")" ]; then
        if ! env "${extra_env[@]}" "$bin" -runs=0 "$corpus" >> "$log" 2>&1; then
            echo "  FAIL $target: saved corpus replay (log: $log)"
            tail -30 "$log" | sed 's/^/       /'
            failed+=("$target")
            continue
        fi
    fi
    # FUZZ_RUNS (the smoke in make test): a fixed number of runs from a
    # fixed seed and a fresh working corpus, so every machine explores the
    # same inputs and a failure reproduces; otherwise FUZZ_SECONDS of
    # open-ended fuzzing that keeps its working corpus between runs.
    if [ -n "${FUZZ_RUNS:-}" ]; then
        rm -rf "$work" && mkdir -p "$work"
        limit=(-seed="${FUZZ_SEED:-1}" -runs="$FUZZ_RUNS")
        what="seed ${FUZZ_SEED:-1}, $FUZZ_RUNS runs"
    else
        limit=(-max_total_time="$secs")
        what="${secs}s"
    fi
    dirs=("$work")
    [ -d "$corpus" ] && dirs+=("$corpus")
    if env "${extra_env[@]}" "$bin" "${limit[@]}" -artifact_prefix="$artifacts" \
            -print_final_stats=1 "${dirs[@]}" >> "$log" 2>&1; then
        runs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -1)
        echo "  ok   $target ($what, ${runs:-?} runs executed)"
        pass=$((pass + 1))
    else
        echo "  FAIL $target: crash while fuzzing (log: $log, artefacts: $artifacts)"
        grep -E 'ERROR|SUMMARY|invariant' "$log" | head -10 | sed 's/^/       /'
        failed+=("$target")
    fi
done
if [ ${#failed[@]} -gt 0 ]; then
    echo "  fuzz failures: ${failed[*]}"
    exit 1
fi
exit 0
