#!/usr/bin/env bash
# Many small requests: a 100-exposure exact tail at 2 thresholds under wrk (2 threads, 32 connections), as a
# ratio to GET /healthz measured on the same server in the same run. With two binaries (before and after a
# change) both are measured one after the other, so their ratios can be compared side by side.
#
#   scripts/small_requests.sh                        # the release build of this checkout
#   DURATION=10 scripts/small_requests.sh OLD NEW     # two binaries
#
# Needs wrk (Debian: apt-get install wrk) and python3. Timings depend on what else runs on the machine:
# compare ratios from one run, not across runs.
set -euo pipefail
cd "$(dirname "$0")/.."
DURATION=${DURATION:-10}
command -v wrk >/dev/null || { echo "wrk is missing: apt-get install -y wrk" >&2; exit 2; }
if [ $# -eq 0 ]; then
    nice -n 10 cargo build --release --locked --bin tailtally
    set -- target/release/tailtally
fi
BIN=$1 source scripts/serve.sh
python3 - "$WORK/tail.json" <<'PY'
import json, random, sys
rng = random.Random(7)
p = [rng.uniform(0, 0.2) for _ in range(100)]
json.dump({"portfolio": {"probabilities": p}, "thresholds": [12, 20]}, open(sys.argv[1], "w"))
PY
cat > "$WORK/post.lua" <<'LUA'
local f = assert(io.open(os.getenv("BODY"), "rb"))
wrk.method = "POST"
wrk.body = f:read("*a")
f:close()
wrk.headers["Content-Type"] = "application/json"
LUA
# The server's CPU (user + system, from /proc) per request: unlike the rates, it does not count wrk's own CPU
# on the same cores, and moves less with the machine's other load.
cpu() { awk '{print $14 + $15}' "/proc/$SERVER_PID/stat"; }
TICK=$(getconf CLK_TCK)
# "RATE CPU_US_PER_REQUEST" of one wrk run.
rate() {
    local before out
    before=$(cpu)
    out=$(wrk -t2 -c32 -d"${DURATION}s" "$@")
    python3 -c "import sys; n, rate = sys.argv[1:3]; print(rate, f'{($(cpu) - $before) / $TICK / int(n) * 1e6:.1f}')" \
        "$(echo "$out" | awk '/requests in/ {print $1}')" "$(echo "$out" | awk '/Requests\/sec/ {print $2}')"
}
echo "| binary | /healthz req/s | tail req/s | ratio | server CPU us/request: /healthz | tail | inline answers |"
echo "|---|---|---|---|---|---|---|"
for BIN in "$@"; do
    start_server
    read -r H HC < <(rate "http://$ADDR/healthz")
    read -r T TC < <(BODY="$WORK/tail.json" rate -s "$WORK/post.lua" "http://$ADDR/v1/tail")
    I=$(curl -s "http://$ADDR/metrics" | awk '/^tailtally_questions_inline_total/ {print $2}')
    echo "| $BIN | $H | $T | $(python3 -c "print(f'{$T/$H:.2f}')") | $HC | $TC | ${I:-n/a} |"
    stop_server
done
