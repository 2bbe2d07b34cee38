#!/usr/bin/env bash
# How much of what the schema allows does the service answer? Schemathesis generates schema-valid requests
# only (positive mode, the random "fuzzing" phase), every request is recorded (HAR), and
# scripts/acceptance_table.py prints, per operation, the share answered 200, failing when a JSON operation is
# below MIN_RATE. A low share means the document allows what the service refuses: a rule the schema could
# state but does not.
#
#   scripts/acceptance.sh                     # 100 cases per operation, seed 1, release build
#   MAX_EXAMPLES=50 PROFILE=debug scripts/acceptance.sh
#
# The server runs with the limits the document states (its `maxItems` and maximums are the defaults of
# `tailtally --help`), except for the work budget, which a schema cannot state (it depends on n, the method and
# the question): the default budget is kept, so what is refused as too costly counts against the share.
# Multipart operations (exposures as a CSV or Arrow table) are measured and reported, but not held to the
# threshold: their table is opaque bytes to a generator. POST /v1/batch (NDJSON) is left out.
set -euo pipefail
cd "$(dirname "$0")/.."

MAX_EXAMPLES=${MAX_EXAMPLES:-100}
PROFILE=${PROFILE:-release}
SEED=${SEED:-1}
MIN_RATE=${MIN_RATE:-0.8}
command -v schemathesis >/dev/null || { echo "schemathesis is missing: pip install schemathesis" >&2; exit 2; }

if [ "$PROFILE" = release ]; then
    nice -n 10 cargo build --release --locked --bin tailtally
    BIN=target/release/tailtally
else
    nice -n 10 cargo build --locked --bin tailtally
    BIN=target/debug/tailtally
fi

WORK=$(mktemp -d)
SERVER_PID=
cleanup() {
    if [ -n "$SERVER_PID" ] && kill -0 "$SERVER_PID" 2>/dev/null; then kill -TERM "$SERVER_PID"; wait "$SERVER_PID" || true; fi
    rm -rf "$WORK"
}
trap cleanup EXIT

"$BIN" --listen 127.0.0.1:0 --log-format json --request-timeout-secs 20 ${LIMITS:-} 2>"$WORK/server.log" &
SERVER_PID=$!
ADDR=
for _ in $(seq 1 100); do
    ADDR=$(grep -o '"addr":"[^"]*"' "$WORK/server.log" | head -1 | cut -d'"' -f4 || true)
    [ -n "$ADDR" ] && break
    sleep 0.1
done
[ -n "$ADDR" ] || { echo "the server did not start:"; cat "$WORK/server.log"; exit 1; }
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
        echo "schemathesis found server errors:"; tail -40 "$1.log"; exit 1; }
}
measure "$WORK/schema.har"
(export PYTHONPATH="$PWD/scripts${PYTHONPATH:+:$PYTHONPATH}" SCHEMATHESIS_HOOKS=acceptance_hooks; measure "$WORK/rules.har")
[ -z "${KEEP:-}" ] || cp "$WORK"/*.har* "$KEEP"
echo "Schema-valid requests:"
python3 scripts/acceptance_table.py "$WORK/schema.har" 0
echo
echo "Schema-valid requests that meet the rules between fields (ids and loadings one per probability, total Poisson rate, from <= to):"
python3 scripts/acceptance_table.py "$WORK/rules.har" "$MIN_RATE"
