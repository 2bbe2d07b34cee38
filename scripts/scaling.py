#!/usr/bin/env python3
"""The scaling table of benches/README.md: time and peak memory of POST /v1/tail against the number of listed
exposures (10^2 .. 10^7) for the exact, saddlepoint and normal methods, and against the number of thresholds
(1, 10, 100, 10^4) at 10^5 exposures (exact).

    python3 scripts/scaling.py                 # the release build of this checkout, markdown on stdout
    python3 scripts/scaling.py BIN --max-exp 6 # another binary, up to 10^6 exposures

The book is p_i ~ U(0, 0.2) from numpy.random.default_rng(42), sent as JSON with repr-exact doubles; the
threshold is k = ceil(mean + 5 sd), the thresholds of the second table are spread evenly from the mean to
mean + 5 sd. For each case: the engine's time (the sum of the answer's `elapsed_us`, which the exact method spreads
evenly over its thresholds: the method's evaluation of all thresholds, model and moments excluded), the end-to-end time of the request (sending the body, parsing, validation, model,
engine, answer) over one keep-alive connection, both medians (7 runs up to 10^5 exposures, 3 at 10^6, 1 at
10^7, after one warm-up), and the server's peak RSS during the case (VmHWM, reset before each case through
/proc/PID/clear_refs; needs Linux and the right to write there, else the peak so far). Standard library and
numpy only. The machine's other load moves the times: say what ran beside.
"""
import math
import os
import re
import statistics
import subprocess
import sys
import time

import numpy as np
from served import Server

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def vm(pid, key):
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith(key + ":"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def reset_peak(pid):
    try:
        with open(f"/proc/{pid}/clear_refs", "w") as f:
            f.write("5")
        return True
    except OSError:
        return False


def body(p, thresholds, method):
    probs = ",".join(map(repr, p.tolist()))
    ks = ",".join(str(k) for k in thresholds)
    return f'{{"portfolio":{{"probabilities":[{probs}]}},"thresholds":[{ks}],"methods":["{method}"]}}'.encode()


def main():
    args = sys.argv[1:]
    max_exp = 7
    if "--max-exp" in args:
        i = args.index("--max-exp")
        max_exp = int(args[i + 1])
        del args[i:i + 2]
    if args:
        binary = args[0]
    else:
        subprocess.run(["cargo", "build", "--release", "--locked", "--bin", "tailtally"], cwd=ROOT, check=True)
        binary = os.path.join(ROOT, "target/release/tailtally")
    server = Server(binary, timeout=900)
    proc, conn = server.proc, server.conn
    try:
        can_reset = reset_peak(proc.pid)

        def case(b, repeats):
            reset_peak(proc.pid)
            e2e, engine = [], []
            for i in range(repeats + 1):
                t = time.perf_counter()
                conn.request("POST", "/v1/tail", body=b, headers={"Content-Type": "application/json"})
                r = conn.getresponse()
                out = r.read()
                s = time.perf_counter() - t
                if r.status != 200:
                    return None, None, None, f"{r.status}: {out[:200]!r}"
                if i:
                    e2e.append(s * 1000)
                    # The exact method spreads its time evenly over the thresholds it evaluated together:
                    # its total is the sum (one threshold: the value itself).
                    engine.append(sum(float(x) for x in re.findall(rb'"elapsed_us":([-0-9.eE+]+)', out)) / 1000)
            return statistics.median(engine), statistics.median(e2e), vm(proc.pid, "VmHWM"), None

        print(f"binary {binary}; load average at start {os.getloadavg()[0]:.1f} (2 cores)"
              + ("" if can_reset else "; peak RSS could not be reset: the peak so far"))
        print()
        print("| n | body MB | method | engine ms | end to end ms | e2e us per exposure | peak RSS MB |")
        print("|---|---|---|---|---|---|---|")
        rng = np.random.default_rng(42)
        for e in range(2, max_exp + 1):
            n = 10 ** e
            p = np.random.default_rng(42).uniform(0, 0.2, n)
            mean, sd = float(p.sum()), math.sqrt(float((p * (1 - p)).sum()))
            k = math.ceil(mean + 5 * sd)
            repeats = 7 if n <= 100_000 else (3 if n <= 1_000_000 else 1)
            for method in ["exact", "saddlepoint", "normal"]:
                b = body(p, [k], method)
                eng, tot, rss, err = case(b, repeats)
                if err:
                    print(f"| {n:,} | {len(b) / 1e6:.1f} | {method} | refused | {err} | | |")
                    continue
                print(f"| {n:,} | {len(b) / 1e6:.1f} | {method} | {eng:.3f} | {tot:.2f} | {tot * 1000 / n:.3f} | {rss:.0f} |",
                      flush=True)
            del p
        del rng
        print()
        print("Thresholds at n = 10^5 (exact, spread from the mean to mean + 5 sd):")
        print()
        print("| thresholds | engine ms | end to end ms | engine us per threshold | peak RSS MB |")
        print("|---|---|---|---|---|")
        p = np.random.default_rng(42).uniform(0, 0.2, 100_000)
        mean, sd = float(p.sum()), math.sqrt(float((p * (1 - p)).sum()))
        lo, hi = math.ceil(mean), math.ceil(mean + 5 * sd)
        for m in [1, 10, 100, 10_000]:
            ks = sorted({lo + round(i * (hi - lo) / max(m - 1, 1)) for i in range(m)}) if m <= hi - lo + 1 else None
            if ks is None or len(ks) < m:
                # More thresholds than counts between mean and mean + 5 sd: take consecutive counts upward.
                ks = list(range(hi - m + 1, hi + 1)) if hi - m + 1 >= 0 else list(range(m))
            eng, tot, rss, err = case(body(p, ks, "exact"), 7 if m <= 100 else 3)
            if err:
                print(f"| {m:,} | refused | {err} | | |")
                continue
            print(f"| {m:,} | {eng:.2f} | {tot:.2f} | {eng * 1000 / m:.2f} | {rss:.0f} |", flush=True)
    finally:
        server.stop()


if __name__ == "__main__":
    main()
