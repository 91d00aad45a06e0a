#!/usr/bin/env bash
# Integration tests: pytest against a real Kafka broker that the tests
# start themselves (deploy/kafka-local, fixture in conftest.py).  Exit code
# as pytest's, except that "no tests collected" (5) counts as a failure.
set -uo pipefail
top=$(cd "$(dirname "$0")/../.." && pwd)
cd "$top"
build=${BUILD:-build}
case "$build" in /*) ;; *) build="$top/$build" ;; esac
export BUILD="$build"
export ODDSKY_TOP="$top"
export ODDSKY_BIN="${ODDSKY_BIN:-$build/oddsky}"
py="$top/build/venv/bin/python"
if [ ! -x "$py" ]; then
    echo "integration: $py is missing: run tests/setup/ensure-deps.sh" >&2
    exit 1
fi
"$py" -m pytest -q -p no:cacheprovider tests/integration "$@"
rc=$?
if [ $rc -eq 5 ]; then
    echo "integration: no tests collected" >&2
    exit 1
fi
exit $rc
