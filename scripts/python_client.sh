#!/usr/bin/env bash
# The generated Python client against the service: generate it from openapi/openapi.json with
# openapi-python-client (configuration: tests/python_client/generator.yaml), install it, start the release
# binary and run tests/python_client/check_client.py, which calls every operation and compares the answers
# with the document's examples. Needs `pip install openapi-python-client ruff` (.ci/run pins them).
set -euo pipefail
cd "$(dirname "$0")/.."

source scripts/serve.sh

(cd "$WORK" && openapi-python-client generate --path "$OLDPWD/openapi/openapi.json" --meta setup \
    --config "$OLDPWD/tests/python_client/generator.yaml")
# Its own virtual environment, so that the installed package is this run's.
python3 -m venv "$WORK/venv"
"$WORK/venv/bin/pip" install --quiet "$WORK/tailtally-client"

start_server
"$WORK/venv/bin/python" tests/python_client/check_client.py "http://$ADDR" openapi/openapi.json
