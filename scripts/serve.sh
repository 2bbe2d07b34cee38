# Sourced by the scripts that test the running service (schemathesis.sh, acceptance.sh, python_client.sh):
# build the binary for PROFILE (release by default; NO_BUILD=1 skips the build), a work folder removed on
# exit, and `start_server FLAGS...`, which starts it on a free loopback port and sets SERVER_PID and ADDR
# (read from its first JSON log line), and `stop_server`. The server is stopped on exit. A caller that sets BIN
# itself (a binary to measure) gets no build.
PROFILE=${PROFILE:-release}
if [ -n "${BIN:-}" ]; then
    :
elif [ "$PROFILE" = release ]; then
    [ -n "${NO_BUILD:-}" ] || nice -n 10 cargo build --release --locked --bin tailtally
    BIN=target/release/tailtally
else
    [ -n "${NO_BUILD:-}" ] || nice -n 10 cargo build --locked --bin tailtally
    BIN=target/debug/tailtally
fi

WORK=$(mktemp -d)
SERVER_PID=
stop_server() {
    if [ -n "$SERVER_PID" ] && kill -0 "$SERVER_PID" 2>/dev/null; then kill -TERM "$SERVER_PID"; wait "$SERVER_PID" || true; fi
    SERVER_PID=
}
cleanup() {
    stop_server
    rm -rf "$WORK"
}
trap cleanup EXIT

start_server() {
    "$BIN" --listen 127.0.0.1:0 --log-format json "$@" 2>"$WORK/server.log" &
    SERVER_PID=$!
    ADDR=
    for _ in $(seq 1 100); do
        ADDR=$(grep -o '"addr":"[^"]*"' "$WORK/server.log" | head -1 | cut -d'"' -f4 || true)
        [ -n "$ADDR" ] && break
        sleep 0.1
    done
    [ -n "$ADDR" ] || { echo "the server did not start:"; cat "$WORK/server.log"; exit 1; }
}
