#!/usr/bin/env bash
# How much of what the schema allows does the service answer? Schemathesis generates schema-valid requests
# only (positive mode, the random "fuzzing" phase), every request is recorded (HAR), and
# scripts/acceptance_table.py prints, per operation and body type, the share answered 200, failing when one
# is below MIN_RATE. A low share means the document allows what the service refuses: a rule the schema could
# state but does not.
#
#   scripts/acceptance.sh                     # 100 cases per operation, seed 1, release build
#   MAX_EXAMPLES=50 PROFILE=debug scripts/acceptance.sh
#   LIMITS="--max-work 1e12" NO_BUILD=1 scripts/acceptance.sh    # extra server flags; skip the build
#
# The server runs with the limits the document states (its `maxItems` and maximums are the defaults of
# `tailtally --help`), and the default work budget, which no schema can state (it depends on n, the lattice,
# the method and the question): what is refused as too costly counts against the share.
# Multipart bodies (exposures as a table) count on their own line: the hooks write their `exposures` part from
# the generated JSON part, as CSV or Arrow, by the rules the document states in words (`ExposuresTable`).
# MIN_RATE (0.8, the issue's goal) holds for every operation, JSON and multipart, in the second pass. Measured
# at 50 cases per operation on a debug build under load (seed 1, 2026-12-03): every line 93-100% once the chart's
# work rule was stated (`ChartRequest`); the multipart lines have 10-22 cases each, so one refusal moves them by
# 5-10 points, and the misses are 408 timeouts of a loaded machine and 413s of the memory ceiling. Release build
# on a loaded machine (load 11 on 2 cores), seeds 1 and 2, 2026-12-03, once the layers' and quantiles' work
# rules were stated: every line 93-100% (misses: three 408s, one 413 of the work budget on a reverse stress in
# units, one 413 of the memory ceiling).
# POST /v1/batch (NDJSON) is left out.
set -euo pipefail
cd "$(dirname "$0")/.."

MAX_EXAMPLES=${MAX_EXAMPLES:-100}
SEED=${SEED:-1}
MIN_RATE=${MIN_RATE:-0.8}
command -v schemathesis >/dev/null || { echo "schemathesis is missing: pip install schemathesis" >&2; exit 2; }

source scripts/serve.sh

start_server --request-timeout-secs 20 ${LIMITS:-}
echo "tailtally at $ADDR; $MAX_EXAMPLES schema-valid cases per operation, seed $SEED"

# Only the server-error check: a refusal is what is measured here, not a failure of the run. Two passes: the
# schema alone, then the bodies that also meet the rules between fields stated in words in the document
# (scripts/acceptance_hooks.py); MIN_RATE holds for the second, the first is reported.
measure() {
    schemathesis run "http://$ADDR/openapi.json" \
        --mode positive \
        --phases fuzzing \
        --checks not_a_server_error \
        --include-method POST \
        --exclude-path /v1/batch \
        --max-examples "$MAX_EXAMPLES" \
        --seed "$SEED" \
        --request-timeout 60 \
        --workers 2 \
        --continue-on-failure \
        --suppress-health-check all \
        --report har --report-har-path "$1" >"$1.log" 2>&1 || {
        echo "schemathesis found server errors (5xx) or stopped on an error; the tables below are measured all the same:"
        { grep -B2 -A6 -E "Server error|Runtime Error" "$1.log" || true; } | cut -c1-400 | head -40
        SERVER_ERRORS=1; }
}
SERVER_ERRORS=0
measure "$WORK/schema.har"
PYTHONPATH="$PWD/scripts${PYTHONPATH:+:$PYTHONPATH}" SCHEMATHESIS_HOOKS=acceptance_hooks measure "$WORK/rules.har"
[ -z "${KEEP:-}" ] || cp "$WORK"/*.har* "$KEEP"
echo "Schema-valid requests:"
python3 scripts/acceptance_table.py "$WORK/schema.har" 0
echo
echo "Schema-valid requests that meet the rules the document states in words (scripts/acceptance_hooks.py: lists one"
echo "per probability, totals, ranges, coarser units for the work budget, the factor model's questions, the table part):"
status=0
python3 scripts/acceptance_table.py "$WORK/rules.har" "$MIN_RATE" || status=1
# Server errors are the contract check's to fail on (scripts/schemathesis.sh); here they are only shown.
[ "$SERVER_ERRORS" = 0 ] || echo "server errors (5xx) were answered: see above"
exit $status
