#!/usr/bin/env bash
# The unit tests and the daemon's integration tests again, built with
# AddressSanitizer + UBSan (build/asan).
set -uo pipefail
top=$(cd "$(dirname "$0")/.." && pwd)
cd "$top"
export ASAN_OPTIONS=${ASAN_OPTIONS:-detect_leaks=1:abort_on_error=0}
export UBSAN_OPTIONS=${UBSAN_OPTIONS:-print_stacktrace=1:halt_on_error=1}
make --no-print-directory asan || exit 1
# The daemon's end-to-end tests with the sanitized binary.
if [ -f tests/integration/test_daemon.py ]; then
    BUILD=build/asan ODDSKY_SANITIZED=1 tests/integration/run.sh -k "daemon and not two_instances" || exit 1
fi
