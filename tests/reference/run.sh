#!/usr/bin/env bash
# Reference checks: pytest against outside libraries, through build/libodcore.so.
set -uo pipefail
top=$(cd "$(dirname "$0")/../.." && pwd)
cd "$top"
export ODDSKY_CORE_LIB="$top/${BUILD:-build}/libodcore.so"
export ODDSKY_BIN="$top/${BUILD:-build}/oddsky"
exec "$top/build/venv/bin/python" -m pytest -q -p no:cacheprovider tests/reference "$@"
