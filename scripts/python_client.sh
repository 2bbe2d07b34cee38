#!/usr/bin/env bash
# The generated Python client against the service: generate it from openapi/openapi.json with
# openapi-python-client (configuration: tests/python_client/generator.yaml), install it, start the release
# binary and run tests/python_client/check_client.py, which calls every operation and compares the answers
# with the document's examples. Needs `pip install openapi-python-client ruff` (.ci/run pins them).
set -euo pipefail
cd "$(dirname "$0")/.."

PROFILE=${PROFILE:-release}
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

(cd "$WORK" && openapi-python-client generate --path "$OLDPWD/openapi/openapi.json" --meta setup \
    --config "$OLDPWD/tests/python_client/generator.yaml")
# Its own virtual environment, so that the installed package is this run's.
python3 -m venv "$WORK/venv"
"$WORK/venv/bin/pip" install --quiet "$WORK/tailtally-client"

"$BIN" --listen 127.0.0.1:0 --log-format json 2>"$WORK/server.log" &
SERVER_PID=$!
ADDR=
for _ in $(seq 1 100); do
    ADDR=$(grep -o '"addr":"[^"]*"' "$WORK/server.log" | head -1 | cut -d'"' -f4 || true)
    [ -n "$ADDR" ] && break
    sleep 0.1
done
[ -n "$ADDR" ] || { echo "the server did not start:"; cat "$WORK/server.log"; exit 1; }
"$WORK/venv/bin/python" tests/python_client/check_client.py "http://$ADDR" openapi/openapi.json
