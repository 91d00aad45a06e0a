#!/usr/bin/env bash
# valgrind memcheck over every unit test: no errors and no leaks.
set -uo pipefail
top=$(cd "$(dirname "$0")/.." && pwd)
cd "$top"
build=${BUILD:-build}
export ODDSKY_TOP="$top" ODDSKY_UNDER_VALGRIND=1
fail=0
for t in "$build"/tests/unit/test_*; do
    [ -x "$t" ] || continue
    name=$(basename "$t")
    log="$build/tests/unit/$name.valgrind.log"
    if valgrind --quiet --error-exitcode=99 --leak-check=full \
        --errors-for-leak-kinds=definite,indirect --show-leak-kinds=definite,indirect \
        "$t" > "$log" 2>&1; then
        echo "  ok   valgrind $name"
    else
        echo "  FAIL valgrind $name (log: $log)"
        tail -30 "$log" | sed 's/^/       /'
        fail=1
    fi
done
exit $fail
