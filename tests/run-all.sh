#!/usr/bin/env bash
# Run every test stage and print one closing line "N passed, N failed".
#
# Stages: unit (cmocka binaries), reference (pytest against outside
# libraries), integration (real Kafka broker), fuzz smoke, web (headless
# Chromium), valgrind over the unit tests, and the unit and integration
# tests again under AddressSanitizer + UBSan.  --quick (used by make asan
# on its own build) runs the unit tests only.
set -uo pipefail
top=$(cd "$(dirname "$0")/.." && pwd)
cd "$top"
export BUILD=${BUILD:-build}
export ODDSKY_TOP="$top"
export PATH="$top/build/venv/bin:$PATH"
quick=0
[ "${1:-}" = "--quick" ] && quick=1

pass=0
fail=0
failed=()
record() { # name rc
    if [ "$2" -eq 0 ]; then pass=$((pass + 1)); else fail=$((fail + 1)); failed+=("$1"); fi
}

echo "== unit tests"
for t in "$BUILD"/tests/unit/test_*; do
    [ -x "$t" ] || continue
    name=$(basename "$t")
    if "$t" > "$BUILD/tests/unit/$name.log" 2>&1; then
        echo "  ok   $name"
        record "$name" 0
    else
        echo "  FAIL $name (log: $BUILD/tests/unit/$name.log)"
        tail -20 "$BUILD/tests/unit/$name.log" | sed 's/^/       /'
        record "$name" 1
    fi
done

run_stage() { # name script
    local name=$1 script=$2
    [ -x "$script" ] || return 0
    echo "== $name"
    "$script"
    record "$name" $?
}

if [ $quick -eq 0 ]; then
    run_stage "reference tests" tests/reference/run.sh
    run_stage "integration tests" tests/integration/run.sh
    run_stage "fuzz smoke" tests/fuzz/smoke.sh
    run_stage "web tests" tests/web/run.sh
    run_stage "valgrind (unit tests)" tests/run-valgrind.sh
    run_stage "sanitizers (unit and integration tests)" tests/run-sanitizers.sh
fi

echo
if [ $fail -gt 0 ]; then
    echo "failed: ${failed[*]}"
fi
echo "$pass passed, $fail failed"
[ $fail -eq 0 ]
