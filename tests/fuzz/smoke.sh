#!/usr/bin/env bash
# Short fuzz run for make test: every target, FUZZ_SMOKE_SECONDS (20) each.
# See tests/fuzz/run.sh for the conventions.
here=$(cd "$(dirname "$0")" && pwd)
FUZZ_SECONDS=${FUZZ_SMOKE_SECONDS:-20} exec "$here/run.sh"
