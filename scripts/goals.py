#!/usr/bin/env python3
"""Every goal of issue 13 ("Speed") measured side by side in one run, printed as a table with its ratio.

    python3 scripts/goals.py                          # the release build of this checkout
    python3 scripts/goals.py OLD_BIN NEW_BIN          # two binaries, each case measured on both in turn
    python3 scripts/goals.py --quick BIN              # smaller repeats (a smoke run)

Each binary is started on a free port with its default limits; the cases alternate between the binaries so
that both see the same load. The book is p_i ~ U(0, 0.2) from numpy.random.default_rng(42) (n = 10^6 and
10^4), the threshold k = ceil(mean + 5 sd); times are medians over one keep-alive connection.

  * exact tail, 10^6 listed exposures: the engine's `elapsed_us` and the end-to-end time of POST /v1/tail;
  * exact tail, 10^4 exposures over HTTP, as a ratio to scipy.stats.poisson_binom.sf in this process (the
    scipy call is timed here, in the same run; needs scipy >= 1.15);
  * 100 exposures at 2 thresholds under wrk (2 threads, 32 connections) as a ratio to GET /healthz on the
    same server (the body of scripts/small_requests.sh);
  * saddlepoint at 10^6: the engine's `elapsed_us`;
  * a batch of 10,000 NDJSON lines of 50 exposures (one threshold each) over HTTP, in lines per second.

Needs numpy, scipy (for the scipy row) and wrk (for the wrk row; apt-get install wrk). The machine's other
load moves every number: read the ratios of one run, and say what else was running.
"""
import json
import math
import os
import random
import re
import statistics
import subprocess
import sys
import tempfile
import time

import numpy as np
from served import Server

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def book(n, seed=42):
    p = np.random.default_rng(seed).uniform(0, 0.2, n)
    mean = float(p.sum())
    sd = math.sqrt(float((p * (1 - p)).sum()))
    return p, math.ceil(mean + 5 * sd)


def tail_body(p, k, method="exact"):
    # repr-exact doubles, as the scipy side sees them.
    probs = ",".join(repr(float(x)) for x in p)
    return f'{{"portfolio":{{"probabilities":[{probs}]}},"thresholds":[{k}],"methods":["{method}"]}}'.encode()


def elapsed_ms(answer):
    return float(re.search(rb'"elapsed_us":([-0-9.eE+]+)', answer).group(1)) / 1000.0


def timed(server, body, repeats, path="/v1/tail", ctype="application/json"):
    """Median end-to-end ms and median engine ms (elapsed_us) over `repeats` requests, after one warm-up."""
    server.post(path, body, ctype)
    e2e, engine = [], []
    for _ in range(repeats):
        s, status, out = server.post(path, body, ctype)
        assert status == 200, (status, out[:300])
        e2e.append(s * 1000)
        if path == "/v1/tail":
            engine.append(elapsed_ms(out))
    return statistics.median(e2e), (statistics.median(engine) if engine else None)


def wrk_rate(url, script=None, seconds=8):
    cmd = ["wrk", "-t2", "-c32", f"-d{seconds}s"] + (["-s", script] if script else []) + [url]
    out = subprocess.run(cmd, capture_output=True, text=True, check=True).stdout
    return float(re.search(r"Requests/sec:\s+([0-9.]+)", out).group(1))


def main():
    args = sys.argv[1:]
    quick = "--quick" in args
    args = [a for a in args if a != "--quick"]
    if not args:
        subprocess.run(["cargo", "build", "--release", "--locked", "--bin", "tailtally"], cwd=ROOT, check=True)
        args = [os.path.join(ROOT, "target/release/tailtally")]
    reps = 3 if quick else 7
    servers = [Server(b) for b in args]
    rows = []  # (case, goal text, [value per binary], goal test)
    try:
        p6, k6 = book(1_000_000)
        body6 = tail_body(p6, k6)
        big = [timed(s, body6, reps) for s in servers]
        rows.append(("exact tail, 10^6 listed, engine ms (`elapsed_us`)", "<= 40", [b[1] for b in big], 40.0, "le"))
        rows.append(("the same over HTTP, end to end ms", "<= 110", [b[0] for b in big], 110.0, "le"))
        sad = [timed(s, tail_body(p6, k6, "saddlepoint"), reps)[1] for s in servers]
        rows.append(("saddlepoint at 10^6, engine ms", "<= 5", sad, 5.0, "le"))
        del body6

        p4, k4 = book(10_000)
        body4 = tail_body(p4, k4)
        ours4 = [timed(s, body4, 3 * reps)[0] for s in servers]
        try:
            from scipy.stats import poisson_binom
            ts = []
            for _ in range(reps):
                t = time.perf_counter()
                poisson_binom.sf(k4 - 1, p4)
                ts.append((time.perf_counter() - t) * 1000)
            scipy_ms = statistics.median(ts)
            rows.append((f"exact tail, 10^4 over HTTP / scipy sf in-process ({scipy_ms:.1f} ms)", "<= 0.02",
                         [o / scipy_ms for o in ours4], 0.02, "le"))
        except ImportError:
            rows.append(("exact tail, 10^4 over HTTP, ms (scipy >= 1.15 missing: no ratio)", "n/a", ours4, None, ""))

        lines = []
        rng = np.random.default_rng(7)
        for i in range(10_000):
            p = rng.uniform(0, 0.2, 50)
            k = math.ceil(p.sum() + 2 * math.sqrt((p * (1 - p)).sum()))
            probs = ",".join(repr(float(x)) for x in p)
            lines.append(f'{{"id":{i},"tail":{{"portfolio":{{"probabilities":[{probs}]}},"thresholds":[{k}]}}}}')
        # curl, which reads the streamed answers while it sends (http.client sends the whole body first, and
        # the server stops a connection that does not read its answer).
        rates = []
        with tempfile.NamedTemporaryFile(suffix=".ndjson") as f:
            f.write(("\n".join(lines) + "\n").encode())
            f.flush()
            for s in servers:
                ts = []
                for _ in range(1 + max(3, reps // 2)):
                    out = subprocess.run(
                        ["curl", "-sS", "-o", "/dev/null", "-w", "%{http_code} %{time_total}", "-H",
                         "Content-Type: application/x-ndjson", "--data-binary", f"@{f.name}",
                         f"http://127.0.0.1:{s.port}/v1/batch"], capture_output=True, text=True, check=True).stdout
                    code, secs = out.split()
                    assert code == "200", out
                    ts.append(float(secs))
                rates.append(10_000 / statistics.median(ts[1:]))
        rows.append(("batch of 10,000 lines of 50 exposures, lines/s", ">= 40,000", rates, 40_000.0, "ge"))

        rnd = random.Random(7)
        small = {"portfolio": {"probabilities": [rnd.uniform(0, 0.2) for _ in range(100)]}, "thresholds": [12, 20]}
        with tempfile.TemporaryDirectory() as tmp:
            body_path = os.path.join(tmp, "tail.json")
            with open(body_path, "w") as f:
                json.dump(small, f)
            lua = os.path.join(tmp, "post.lua")
            with open(lua, "w") as f:
                f.write(f'local f = assert(io.open("{body_path}", "rb"))\nwrk.method = "POST"\n'
                        'wrk.body = f:read("*a")\nf:close()\nwrk.headers["Content-Type"] = "application/json"\n')
            secs = 4 if quick else 8
            ratios = []
            for s in servers:
                h = wrk_rate(f"http://127.0.0.1:{s.port}/healthz", seconds=secs)
                t = wrk_rate(f"http://127.0.0.1:{s.port}/v1/tail", lua, secs)
                ratios.append(t / h)
                print(f"# {s.binary}: /healthz {h:,.0f} req/s, 100-exposure tail {t:,.0f} req/s", file=sys.stderr)
            rows.append(("100-exposure exact tail, 2 thresholds, under wrk / /healthz", ">= 0.5", ratios, 0.5, "ge"))
    finally:
        for s in servers:
            s.stop()

    load = os.getloadavg()
    print(f"load average during the run: {load[0]:.1f} {load[1]:.1f} {load[2]:.1f} (2 cores)\n")
    head = " | ".join(os.path.basename(os.path.dirname(b)) + "/" + os.path.basename(b) for b in args)
    print(f"| case | goal | {head} | met (last binary) |")
    print("|---|---|" + "---|" * len(args) + "---|")
    for case, goal, vals, target, how in rows:
        cells = " | ".join("n/a" if v is None else (f"{v:,.0f}" if v >= 1000 else f"{v:.3g}") for v in vals)
        last = vals[-1]
        met = "n/a" if target is None or last is None else (
            "yes" if (last <= target if how == "le" else last >= target) else "no")
        print(f"| {case} | {goal} | {cells} | {met} |")


if __name__ == "__main__":
    main()
