#!/usr/bin/env bash
# Web test: serve the fake provider with the real status server, check
# /metrics with promtool, then load the live page in headless Chromium and
# check what it draws (tests/web/check_page.py).  Artefacts (DOM dump,
# screenshot, metrics text) go to $BUILD/web/.
set -euo pipefail
top=$(cd "$(dirname "$0")/../.." && pwd)
cd "$top"
BUILD=${BUILD:-build}
out="$BUILD/web"
mkdir -p "$out"

make -s --no-print-directory BUILD="$BUILD" \
    "$BUILD/daemon/status.o" "$BUILD/daemon/metrics.o" "$BUILD/daemon/livepage.o"
cc -std=c11 -D_POSIX_C_SOURCE=200809L -D_DEFAULT_SOURCE -Wall -Wextra -Werror -g -I. \
    -o "$out/serve_fake" tests/web/serve_fake.c tests/web/fake_provider.c \
    "$BUILD/daemon/status.o" "$BUILD/daemon/metrics.o" "$BUILD/daemon/livepage.o" \
    -luv -lhttp_parser -ljansson -lm

tmp=$(mktemp -d)
pid=""
cleanup() {
    [ -n "$pid" ] && kill "$pid" 2>/dev/null && wait "$pid" 2>/dev/null
    rm -rf "$tmp"
}
trap cleanup EXIT
mkdir -p "$tmp/served"
"$out/serve_fake" "$tmp/served" "$tmp/port" &
pid=$!
for _ in $(seq 100); do
    [ -s "$tmp/port" ] && break
    sleep 0.05
done
port=$(cat "$tmp/port")
url="http://127.0.0.1:$port"
echo "  fake status server on $url"

# source: promtool (Prometheus 2.42) check metrics: text format and lint.
curl -sf "$url/metrics" > "$out/metrics.txt"
if promtool check metrics < "$out/metrics.txt"; then
    echo "  ok   promtool check metrics"
else
    echo "  FAIL promtool check metrics ($out/metrics.txt)"
    exit 1
fi

py="$top/build/venv/bin/python3"
[ -x "$py" ] || py=python3
"$py" tests/web/check_page.py --url "$url/" --served "$tmp/served" --out "$out"
BUILD="$BUILD" tests/web/run_daemon.sh
