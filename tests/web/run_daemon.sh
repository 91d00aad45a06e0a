#!/usr/bin/env bash
# Web test against a running daemon: `oddsky demo` (embedded in-memory
# Kafka) checked through its status endpoint, /metrics with promtool and the
# live page in headless Chromium (tests/web/test_daemon_status.py).
# Artefacts (screenshot livepage-daemon.png, DOM dump, metrics text, the
# demos' stderr) go to $BUILD/web/.
set -euo pipefail
top=$(cd "$(dirname "$0")/../.." && pwd)
cd "$top"
BUILD=${BUILD:-build}
export BUILD
mkdir -p "$BUILD/web"
make -s --no-print-directory BUILD="$BUILD" "$BUILD/oddsky"
py="$top/build/venv/bin/python3"
[ -x "$py" ] || py=python3
"$py" -m pytest -q -p no:cacheprovider tests/web/test_daemon_status.py "$@"
