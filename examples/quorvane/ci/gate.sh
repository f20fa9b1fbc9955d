#!/usr/bin/env sh
# Plain shell CI step (any CI system): run from the repository root.
# Exit code: 0 pass, 1 a case regressed, 2 the baseline or the catalogue is
# wrong (missing or malformed file, instances changed since recording).
# Point the CI system's test-report collector at gate-junit.xml.
set -eu
benchsuite gate --rule quorvane_optim:QuorvaneAdam --baseline baseline.json \
    --catalogue problems.toml --junit gate-junit.xml --markdown gate-summary.md
