#!/usr/bin/env bash
# Full-size abuse probes against the release binary with its default limits: slowloris heads, many idle
# connections, slow computing bodies, a trickling batch, gzip bombs at the concurrency limit, and SIGTERM
# while uploads are held. Every probe has a fixed bound on its time. While each runs, a monitor samples the
# server's resident memory (/proc/PID/status) every 50 ms and asks /healthz on a fresh connection every
# 100 ms. Prints one table row per probe: probe, status, time, peak RSS, /healthz max latency (and failures).
#
#   scripts/abuse.sh                  # builds the release binary first
#   SKIP_BUILD=1 scripts/abuse.sh     # uses ${CARGO_TARGET_DIR:-target}/release/tailtally as it is
#   PROBES="slowloris gzip" scripts/abuse.sh
#
# Needs python3. Opens up to 10,000 client sockets: the client's open-files limit is raised to its hard limit.
set -euo pipefail
cd "$(dirname "$0")/.."

if [ -z "${SKIP_BUILD:-}" ]; then nice -n 10 cargo build --release --locked --bin tailtally; fi
BIN=${BIN:-${CARGO_TARGET_DIR:-target}/release/tailtally}
[ -x "$BIN" ] || { echo "no binary at $BIN" >&2; exit 2; }
PROBES=${PROBES:-"slowloris idle slow-bodies slow-batch gzip sigterm"}

WORK=$(mktemp -d)
SERVER_PID=
cleanup() {
    if [ -n "$SERVER_PID" ] && kill -0 "$SERVER_PID" 2>/dev/null; then kill -KILL "$SERVER_PID" 2>/dev/null || true; fi
    rm -rf "$WORK"
}
trap cleanup EXIT

PORT=$(python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')
"$BIN" --listen "127.0.0.1:$PORT" --log-format json 2>"$WORK/server.log" >/dev/null &
SERVER_PID=$!
for _ in $(seq 1 100); do
    if python3 -c "import socket; socket.create_connection(('127.0.0.1', $PORT), 1).close()" 2>/dev/null; then break; fi
    sleep 0.1
done

echo "tailtally $("$BIN" --version | cut -d' ' -f2), default limits, $(nproc) cores, pid $SERVER_PID, port $PORT"
python3 - "$PORT" "$SERVER_PID" "$PROBES" <<'PY'
import gzip, os, resource, socket, sys, threading, time

PORT, PID, PROBES = int(sys.argv[1]), int(sys.argv[2]), sys.argv[3].split()
ADDR = ("127.0.0.1", PORT)
soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
resource.setrlimit(resource.RLIMIT_NOFILE, (hard, hard))
SMALL = b'{"portfolio": {"probabilities": [0.1, 0.2, 0.3]}, "thresholds": [1, 2]}'


def exchange(data, timeout=10.0):
    """Send one request on a fresh connection, read until the server closes; (status or None, raw)."""
    s = socket.create_connection(ADDR, timeout)
    try:
        s.sendall(data)
        raw = b""
        while True:
            chunk = s.recv(65536)
            if not chunk:
                break
            raw += chunk
    except OSError:
        pass
    finally:
        s.close()
    try:
        return int(raw[9:12]), raw
    except ValueError:
        return None, raw


def post(path, body, ctype="application/json", extra=""):
    head = f"POST {path} HTTP/1.1\r\nhost: x\r\ncontent-type: {ctype}\r\ncontent-length: {len(body)}\r\n{extra}connection: close\r\n\r\n"
    return head.encode() + body


MONITOR = r"""
import socket, sys, threading, time
port, pid = int(sys.argv[1]), int(sys.argv[2])
peak, worst, fails, asked, stop = 0.0, 0.0, 0, 0, False
def rss():
    global peak
    while not stop:
        try:
            with open(f"/proc/{pid}/status") as f:
                for line in f:
                    if line.startswith("VmRSS:"):
                        peak = max(peak, int(line.split()[1]) / 1024)
        except OSError:
            pass
        time.sleep(0.05)
def health():
    global worst, fails, asked
    while not stop:
        t, ok = time.monotonic(), False
        try:
            s = socket.create_connection(("127.0.0.1", port), 5)
            s.settimeout(5)
            s.sendall(b"GET /healthz HTTP/1.1\r\nhost: x\r\nconnection: close\r\n\r\n")
            raw = b""
            while True:
                c = s.recv(4096)
                if not c:
                    break
                raw += c
            s.close()
            ok = raw.startswith(b"HTTP/1.1 200")
        except OSError:
            pass
        asked += 1
        if ok:
            worst = max(worst, time.monotonic() - t)
        else:
            fails += 1
        time.sleep(0.1)
threads = [threading.Thread(target=rss), threading.Thread(target=health)]
for t in threads:
    t.start()
sys.stdin.read()
stop = True
for t in threads:
    t.join()
print(peak, worst, fails, asked)
"""


class Monitor:
    """Peak RSS and /healthz latency (fresh connection each time, 5 s timeout) while a probe runs, from a
    process of its own, so that the load generator's threads do not delay its measurements."""

    def __init__(self):
        import subprocess
        self.p = subprocess.Popen([sys.executable, "-c", MONITOR, str(PORT), str(PID)], stdin=subprocess.PIPE,
                                  stdout=subprocess.PIPE, text=True)

    def done(self):
        out, _ = self.p.communicate("")
        peak, worst, fails, asked = out.split()
        return float(peak), float(worst), int(fails), int(asked)


ROWS = []


def run(name, probe, prepare):
    arg = prepare() if prepare else None
    m = Monitor()
    t = time.monotonic()
    status = probe(arg) if prepare else probe()
    took = time.monotonic() - t
    peak, worst, fails, asked = m.done()
    health = f"{worst * 1000:.1f} ms" + (f" ({fails}/{asked} failed)" if fails else f" ({asked} asked)")
    ROWS.append((name, status, f"{took:.1f} s", f"{peak:.0f} MB", health))
    print(f"  done: {name}: {status}", file=sys.stderr, flush=True)


def open_many(n, first=b""):
    """Up to n connections, each with the time it was opened."""
    socks = []
    for _ in range(n):
        try:
            s = socket.create_connection(ADDR, 5)
            if first:
                s.sendall(first)
            s.setblocking(False)
            socks.append((s, time.monotonic()))
        except OSError:
            break
    return socks


def closed_by_server(s):
    try:
        data = s.recv(4096)
        return data == b"" or data.startswith(b"HTTP/1.1 503")
    except BlockingIOError:
        return False
    except OSError:
        return True


def watch_closures(socks, seconds, every=1.0, feed=None):
    """Seconds from its opening until each socket was closed by the server (None: still open at the end)."""
    closed = [None] * len(socks)
    end = time.monotonic() + seconds
    while time.monotonic() < end and any(c is None for c in closed):
        for i, (s, opened) in enumerate(socks):
            if closed[i] is not None:
                continue
            if feed is not None:
                try:
                    s.send(feed)
                except BlockingIOError:
                    pass
                except OSError:
                    closed[i] = time.monotonic() - opened
                    continue
            if closed_by_server(s):
                closed[i] = time.monotonic() - opened
        time.sleep(every)
    for s, _ in socks:
        s.close()
    return closed


def slowloris():
    # 1,000 heads that never end, a header byte pair a second each (the header timeout is 10 s).
    socks = open_many(1000, b"GET /healthz HTTP/1.1\r\nhost: x\r\n")
    closed = watch_closures(socks, 35, 1.0, b"x")
    cut = [c for c in closed if c is not None]
    return f"{len(cut)}/{len(socks)} cut, last after {max(cut):.0f} s" if cut else "none cut"


def server_metric(prefix):
    """A sample of the server's /metrics (retried while the server refuses the connection)."""
    for _ in range(100):
        try:
            status, raw = exchange(b"GET /metrics HTTP/1.1\r\nhost: x\r\nconnection: close\r\n\r\n", 5)
        except OSError:
            status = None
        if status == 200:
            for line in raw.decode().splitlines():
                if line.startswith(prefix):
                    return float(line.rsplit(" ", 1)[1])
        time.sleep(0.1)
    return float("nan")


def idle():
    # 10,000 connections that send nothing: more than --max-connections (4096) + reserved (32). How each
    # ended is the server's own count (/metrics), the client's view of 10,000 sockets being too coarse.
    refused0 = server_metric("tailtally_connections_refused_total ")
    cut0 = server_metric('tailtally_connections_closed_total{reason="header-timeout"}')
    socks = open_many(10000)
    closed = watch_closures(socks, 30, 0.5)
    still = sum(1 for c in closed if c is None)
    refused = server_metric("tailtally_connections_refused_total ") - refused0
    cut = server_metric('tailtally_connections_closed_total{reason="header-timeout"}') - cut0
    return f"{len(socks)} opened: {refused:.0f} refused, {cut:.0f} cut by the header timeout, {still} left"


def slow_bodies():
    # 64 computing requests (= --max-concurrency) sending a body byte every 5 s, while ordinary requests
    # keep arriving; the body deadline is 30 s.
    socks = []
    body = SMALL.ljust(200)
    for _ in range(64):
        s = socket.create_connection(ADDR, 5)
        s.sendall(post("/v1/tail", body)[:-len(body)])
        s.setblocking(False)
        socks.append(s)
    oks = [0, 0]

    def ordinary():
        for _ in range(30):
            status, _ = exchange(post("/v1/tail", SMALL))
            oks[0] += 1
            oks[1] += status == 200
            time.sleep(1)

    t = threading.Thread(target=ordinary)
    t.start()
    answered = [None] * 64
    start = time.monotonic()
    while time.monotonic() - start < 45 and any(a is None for a in answered):
        for i, s in enumerate(socks):
            if answered[i] is not None:
                continue
            try:
                data = s.recv(4096)
                answered[i] = (data[9:12].decode(errors="replace") or "closed", time.monotonic() - start)
                continue
            except BlockingIOError:
                pass
            except OSError:
                answered[i] = ("reset", time.monotonic() - start)
                continue
            try:
                s.send(body[:1])
            except OSError:
                pass
        time.sleep(5)
    t.join()
    for s in socks:
        s.close()
    codes = {}
    for a in answered:
        codes[a[0] if a else "none"] = codes.get(a[0] if a else "none", 0) + 1
    last = max((a[1] for a in answered if a), default=0)
    return f"slow: {codes} by {last:.0f} s; ordinary 200: {oks[1]}/{oks[0]}"


def slow_batch():
    # A batch whose second line comes a byte every 5 s; it must average 1024 B/s after 30 s of waiting.
    line = b'{"id": 1, "tail": {"portfolio": {"probabilities": [0.5]}, "thresholds": [1]}}\n'
    s = socket.create_connection(ADDR, 5)
    s.sendall(post("/v1/batch", line * 2, "application/x-ndjson")[: -len(line)])
    s.setblocking(False)
    start, raw = time.monotonic(), b""
    while time.monotonic() - start < 60:
        try:
            chunk = s.recv(65536)
            if not chunk:
                break
            raw += chunk
            continue
        except BlockingIOError:
            pass
        except OSError:
            break
        try:
            s.send(b" ")
        except OSError:
            pass
        time.sleep(5)
    s.close()
    took = time.monotonic() - start
    cut = b"slower than 1024 bytes per second" in raw
    return f"{'cut with a problem line' if cut else 'NOT cut'} after {took:.0f} s"


def make_bomb():
    return gzip.compress(SMALL + b" " * (250 * 1000 * 1000 - len(SMALL)), 9)


def gzip_bombs(bomb):
    # 64 concurrent gzip bodies of about 250 KB, each inflating to 250 MB (a valid request padded with
    # spaces, under the 256 MiB --max-body-bytes); the in-flight budget is 1 GiB.
    req = post("/v1/tail", bomb, extra="content-encoding: gzip\r\n")
    codes = {}
    lock = threading.Lock()

    def one():
        try:
            status, _ = exchange(req, 120)
        except OSError:
            status = None
        with lock:
            codes[status] = codes.get(status, 0) + 1

    threads = [threading.Thread(target=one) for _ in range(64)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return f"{len(bomb) // 1000} KB each: " + ", ".join(f"{k}: {v}" for k, v in sorted(codes.items(), key=str))


def sigterm():
    # 20 uploads held (a byte every second, far from done), then SIGTERM: exit 0 within the 20 s grace.
    socks = []
    for _ in range(20):
        s = socket.create_connection(ADDR, 5)
        s.sendall(post("/v1/tail", SMALL.ljust(100))[:-100])
        socks.append(s)
    time.sleep(1)
    t = time.monotonic()
    os.kill(PID, 15)
    def exited():
        # The server is the shell's child: once it exits it is a zombie (or gone) until the shell waits.
        try:
            with open(f"/proc/{PID}/stat") as f:
                return f.read().rsplit(")", 1)[1].split()[0] in ("Z", "X")
        except OSError:
            return True

    last = 0.0
    while time.monotonic() - t < 40 and not exited():
        if time.monotonic() - last >= 1:
            last = time.monotonic()
            for s in socks:
                try:
                    s.send(b" ")
                except OSError:
                    pass
        time.sleep(0.05)
    took = time.monotonic() - t
    for s in socks:
        s.close()
    return f"exited after {took:.1f} s (grace 20 s)"


PROBE = {"slowloris": ("slowloris heads x1000", slowloris, None),
         "idle": ("idle connections x10000", idle, None),
         "slow-bodies": ("slow bodies x64", slow_bodies, None),
         "slow-batch": ("trickling batch", slow_batch, None),
         "gzip": ("gzip bombs x64", gzip_bombs, make_bomb),
         "sigterm": ("SIGTERM, 20 uploads held", sigterm, None)}
for p in PROBES:
    run(*PROBE[p])
    time.sleep(2)

print()
print("| probe | status | time | peak RSS | /healthz max latency |")
print("|---|---|---|---|---|")
for r in ROWS:
    print("| " + " | ".join(r) + " |")
PY
if kill -0 "$SERVER_PID" 2>/dev/null && ! grep -q '^State:.*Z' "/proc/$SERVER_PID/status" 2>/dev/null; then
    echo "server still running (stopped by SIGTERM now)"
    kill -TERM "$SERVER_PID"
fi
if wait "$SERVER_PID"; then echo "server exit status 0"; else echo "server exit status $?"; fi
SERVER_PID=
