#!/usr/bin/env bash
# Short fuzz run for make test: every target replays its saved corpus,
# then runs FUZZ_SMOKE_RUNS (20000) inputs from a fixed seed, so the smoke
# explores the same inputs on every machine.  See tests/fuzz/run.sh.
here=$(cd "$(dirname "$0")" && pwd)
FUZZ_RUNS=${FUZZ_SMOKE_RUNS:-20000} exec "$here/run.sh"
