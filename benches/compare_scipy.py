#!/usr/bin/env python3
"""Compare tailtally's exact engine with scipy.stats.poisson_binom, in time and in accuracy.

For each n (default 1e3, 1e4, 1e5, 1e6) the probabilities p_i ~ U(0, 0.2) come from numpy's
default_rng(42) and are written one per line with repr(float), which round-trips exactly, so both sides
see the same doubles. Then, with k = ceil(mean + 5 sd):

* tail: P(S >= k). Ours: `time_exact FILE tail`. scipy: poisson_binom.sf(k - 1, p).
* full: the whole pmf. Ours: `time_exact FILE full` (the untilted law over its Bernstein window, all mass
  outside it < 1e-32). scipy: poisson_binom.pmf(np.arange(n + 1), p).

Timings are medians over a few runs. A scipy computation is skipped when one run is estimated (from the
previous n, by its quadratic growth) to take more than --scipy-limit seconds, or when its arrays would not
fit in half the available memory.

Accuracy: our value is compared with scipy's sf, which is 1 - cdf and so carries an absolute error of at
least ~1e-16 (more for large n, as the cdf accumulates the rounding of its terms), i.e. a relative error of
1e-9 or worse at p ~ 3e-7; and with scipy's pmf summed from k upward (math.fsum over k..k+L, with L grown
until the log-concavity bound on the rest is below 1e-18 of the sum), which has no cancellation.

Usage: python3 benches/compare_scipy.py [--sizes 1000,10000] [--repeats 7] [--scipy-limit 60] [--no-build]
The markdown table goes to stdout, progress to stderr.
"""

import argparse
import json
import math
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent


def log(msg):
    print(msg, file=sys.stderr, flush=True)


def import_poisson_binom():
    try:
        from scipy.stats import poisson_binom  # scipy >= 1.15
    except (ImportError, AttributeError):
        log("scipy.stats.poisson_binom not available: pip install --upgrade scipy")
        subprocess.check_call([sys.executable, "-m", "pip", "install", "--upgrade", "scipy"])
        from scipy.stats import poisson_binom
    import scipy

    return poisson_binom, scipy.__version__


def build_example():
    """cargo build --release --example time_exact; returns the executable's path (cargo waits for its lock)."""
    log("building: cargo build --release --example time_exact (first time: several minutes)")
    proc = subprocess.run(
        ["cargo", "build", "--release", "--example", "time_exact", "--message-format=json-render-diagnostics"],
        cwd=ROOT,
        stdout=subprocess.PIPE,
        check=True,
        text=True,
    )
    exe = None
    for line in proc.stdout.splitlines():
        try:
            msg = json.loads(line)
        except json.JSONDecodeError:
            continue
        if msg.get("reason") == "compiler-artifact" and msg.get("target", {}).get("name") == "time_exact":
            exe = msg.get("executable") or exe
    if exe is None:
        target = Path(os.environ.get("CARGO_TARGET_DIR", ROOT / "target"))
        exe = str(target / "release" / "examples" / "time_exact")
    return exe


def probabilities(n):
    return np.random.default_rng(42).uniform(0.0, 0.2, n)


def write_probs(p, path):
    with open(path, "w") as f:
        f.write("\n".join(repr(float(x)) for x in p))
        f.write("\n")


def run_ours(exe, path, mode, repeats):
    out = subprocess.run([exe, str(path), mode, str(repeats)], stdout=subprocess.PIPE, check=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def timed(f):
    start = time.perf_counter()
    value = f()
    return time.perf_counter() - start, value


def available_bytes():
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 8 << 30


def repeat_runs(f, first_s):
    """Median over a few runs, fewer when one run is long; first_s is the time of a run already made."""
    times = [first_s]
    extra = 4 if first_s < 1.0 else 2 if first_s < 20.0 else 0
    value = None
    for _ in range(extra):
        t, value = timed(f)
        times.append(t)
    return statistics.median(times), value


class Scipy:
    """scipy runs with the skip rule: estimate from the last measured n by quadratic growth."""

    def __init__(self, pb, limit_s):
        self.pb = pb
        self.limit = limit_s
        self.last = {}  # kind -> (n, seconds per run)

    def estimate(self, kind, n):
        if kind not in self.last:
            return None
        n0, t0 = self.last[kind]
        return t0 * (n / n0) ** 2

    def run(self, kind, n, f, mem_bytes=0):
        """Returns (median seconds or None, value or None, note)."""
        est = self.estimate(kind, n)
        if est is not None and est > self.limit:
            return None, None, f"skipped (est. {est:.0f} s)"
        if mem_bytes > available_bytes() / 2:
            return None, None, f"skipped (needs ~{mem_bytes / 2**30:.0f} GiB)"
        t1, value = timed(f)
        med, v2 = repeat_runs(f, t1)
        if v2 is not None:
            value = v2
        self.last[kind] = (n, med)
        return med, value, None


def scipy_tail_reference(pb, p, k, sd):
    """sum_{j >= k} P(S = j) from scipy's pmf, summed with fsum over k..k+L; L grows until the rest is
    negligible. The Poisson-binomial pmf is log-concave, so past j its terms fall at least geometrically with
    ratio r = f(j) / f(j - 1) and the rest beyond the last term f is at most f r / (1 - r)."""
    n = len(p)
    length = int(math.ceil(10 * sd)) + 20
    while True:
        hi = min(n, k + length)
        f = pb.pmf(np.arange(k, hi + 1), p)
        s = math.fsum(f)
        if hi == n:
            return s
        r = f[-1] / f[-2] if len(f) > 1 and f[-2] > 0 else 1.0
        rest = f[-1] * r / (1.0 - r) if r < 1.0 else math.inf
        if rest <= 1e-18 * s:
            return s
        length *= 2


def fmt_ms(seconds_or_ms, note=None, is_seconds=True):
    if seconds_or_ms is None:
        return note or "n/a"
    ms = seconds_or_ms * 1e3 if is_seconds else seconds_or_ms
    if ms >= 100:
        return f"{ms:,.0f}"
    if ms >= 1:
        return f"{ms:.2f}"
    return f"{ms:.3f}"


def fmt_ratio(scipy_s, ours_ms):
    if scipy_s is None:
        return "n/a"
    r = scipy_s * 1e3 / ours_ms
    return f"{r:,.0f}x" if r >= 10 else f"{r:.1f}x"


def rel_diff(a, b):
    if a is None or b is None:
        return None
    return abs(a - b) / abs(b)


def fmt_e(x, digits=2):
    return "n/a" if x is None else f"{x:.{digits}e}"


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sizes", default="1000,10000,100000,1000000")
    ap.add_argument("--repeats", type=int, default=7, help="runs of our example per computation")
    ap.add_argument("--scipy-limit", type=float, default=60.0, help="skip a scipy run estimated above this (s)")
    ap.add_argument("--no-build", action="store_true", help="use target/release/examples/time_exact as is")
    ap.add_argument("--json", help="also write the raw results to this file")
    args = ap.parse_args()
    sizes = [int(float(s)) for s in args.sizes.split(",")]

    pb, scipy_version = import_poisson_binom()
    if args.no_build:
        exe = str(Path(os.environ.get("CARGO_TARGET_DIR", ROOT / "target")) / "release" / "examples" / "time_exact")
    else:
        exe = build_example()
    pb.sf(1, [0.1, 0.2])  # first-call overhead out of the timings
    sp = Scipy(pb, args.scipy_limit)
    rows = []

    with tempfile.TemporaryDirectory(prefix="tailtally-bench-") as tmp:
        for n in sizes:
            p = probabilities(n)
            path = Path(tmp) / f"p{n}.txt"
            write_probs(p, path)
            mean = math.fsum(p)
            sd = math.sqrt(math.fsum(p * (1.0 - p)))
            k = math.ceil(mean + 5 * sd)

            log(f"n={n}: ours (tail, full)")
            tail = run_ours(exe, path, "tail", args.repeats)
            full = run_ours(exe, path, "full", args.repeats)
            if tail["k"] != k:
                log(f"  warning: k differs (ours {tail['k']}, python {k}); using ours")
                k = tail["k"]

            log(f"n={n}: scipy sf(k-1)")
            st, sv, snote = sp.run("tail", n, lambda: float(pb.sf(k - 1, p)))
            log(f"  {snote or fmt_ms(st) + ' ms'}")
            log(f"n={n}: scipy pmf(0..n)")
            # rv_discrete broadcasts p against the n+1 points: a few (n, n+1) float64 arrays.
            ft, fv, fnote = sp.run("full", n, lambda: pb.pmf(np.arange(n + 1), p), mem_bytes=3 * 8 * n * (n + 1))
            log(f"  {fnote or fmt_ms(ft) + ' ms'}")
            full_sum = None if fv is None else math.fsum(fv)
            fv = None
            # The accurate reference costs one more scipy pmf computation; same skip rule as the tail.
            ref = None
            if st is not None:
                log(f"n={n}: scipy pmf summed from k")
                ref = scipy_tail_reference(pb, p, k, sd)

            rows.append(
                dict(
                    n=n,
                    k=k,
                    ours_tail_ms=tail["median_ms"],
                    ours_full_ms=full["median_ms"],
                    scipy_tail_s=st,
                    scipy_tail_note=snote,
                    scipy_full_s=ft,
                    scipy_full_note=fnote,
                    ours_p=tail["p"],
                    ours_ln_p=tail["ln_p"],
                    ours_rel_bound=tail["rel_err_bound"],
                    max_window=tail["max_window"],
                    ours_full_len=full["pmf_len"],
                    ours_full_sum=full["pmf_sum"],
                    ours_full_tail=full["p"],
                    scipy_sf=sv,
                    scipy_pmf_tail=ref,
                    scipy_full_sum=full_sum,
                )
            )

    print(f"scipy {scipy_version}, numpy {np.__version__}; k = ceil(mean + 5 sd); times are medians in ms.\n")
    print(
        "| n | ours ms (tail) | scipy ms (tail) | scipy/ours | ours ms (full) | scipy ms (full) | scipy/ours "
        "| our P(S>=k) | scipy sf(k-1) | rel. diff | scipy sum pmf[k..] | rel. diff | our rigorous rel. bound |"
    )
    print("|" + "---|" * 13)
    for r in rows:
        print(
            "| {n:,} | {ot} | {stt} | {rt} | {of} | {sft} | {rf} | {op} | {ss} | {d1} | {sr} | {d2} | {b} |".format(
                n=r["n"],
                ot=fmt_ms(r["ours_tail_ms"], is_seconds=False),
                stt=fmt_ms(r["scipy_tail_s"], r["scipy_tail_note"]),
                rt=fmt_ratio(r["scipy_tail_s"], r["ours_tail_ms"]),
                of=fmt_ms(r["ours_full_ms"], is_seconds=False),
                sft=fmt_ms(r["scipy_full_s"], r["scipy_full_note"]),
                rf=fmt_ratio(r["scipy_full_s"], r["ours_full_ms"]),
                op=f"{r['ours_p']:.15e}",
                ss=fmt_e(r["scipy_sf"], 15),
                d1=fmt_e(rel_diff(r["ours_p"], r["scipy_sf"])),
                sr=fmt_e(r["scipy_pmf_tail"], 15),
                d2=fmt_e(rel_diff(r["ours_p"], r["scipy_pmf_tail"])),
                b=fmt_e(r["ours_rel_bound"]),
            )
        )
    print()
    print("| n | k | our full window: length | its sum | our tail from the untilted window | rel. diff to our tail "
          "| scipy sum of pmf(0..n) |")
    print("|" + "---|" * 7)
    for r in rows:
        print(
            "| {n:,} | {k:,} | {ln:,} | {s:.16f} | {t:.15e} | {d} | {fs} |".format(
                n=r["n"],
                k=r["k"],
                ln=r["ours_full_len"],
                s=r["ours_full_sum"],
                t=r["ours_full_tail"],
                d=fmt_e(rel_diff(r["ours_full_tail"], r["ours_p"])),
                fs="n/a" if r["scipy_full_sum"] is None else f"{r['scipy_full_sum']:.16f}",
            )
        )
    if args.json:
        with open(args.json, "w") as f:
            json.dump(rows, f, indent=1)


if __name__ == "__main__":
    main()
