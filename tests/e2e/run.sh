#!/usr/bin/env bash
# End-to-end check of the explorer page: build the service, start it on a free port, drive the page in headless
# Chromium (tests/e2e/explorer.mjs), stop the service. Needs /usr/bin/chromium (Debian package `chromium`) and
# `npm ci` here. The screenshots go to target/e2e/.
set -euo pipefail
cd "$(dirname "$0")"
root="$(cd ../.. && pwd)"
(cd "$root" && cargo build --release --locked --quiet)
# The binary is where cargo put it: CARGO_TARGET_DIR (absolute, or relative to the root) or target/.
target="${CARGO_TARGET_DIR:-target}"
case "$target" in /*) ;; *) target="$root/$target" ;; esac
bin="$target/release/tailtally"
[ -d node_modules/playwright-core ] || npm ci --no-audit --no-fund
log="$(mktemp)"
"$bin" --listen 127.0.0.1:0 --log-format json >"$log" 2>&1 &
pid=$!
trap 'kill "$pid" 2>/dev/null || true; wait "$pid" 2>/dev/null || true; rm -f "$log"' EXIT
addr=""
for _ in $(seq 1 200); do
  addr="$(grep -o 'http://127\.0\.0\.1:[0-9]*' "$log" | head -n 1 || true)"
  [ -n "$addr" ] && break
  kill -0 "$pid" 2>/dev/null || { cat "$log"; echo "e2e: the service exited before listening" >&2; exit 1; }
  sleep 0.1
done
[ -n "$addr" ] || { cat "$log"; echo "e2e: the service did not report its address" >&2; exit 1; }
mkdir -p "$root/target/e2e"
BASE_URL="$addr" OUT_DIR="$root/target/e2e" node explorer.mjs
