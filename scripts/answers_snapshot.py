#!/usr/bin/env python3
"""Record the service's answers to a fixed corpus of requests, for checking that a refactor leaves every answer
byte-identical.

    python3 scripts/answers_snapshot.py BIN OUT_DIR        # start BIN on a free port, write one file per request
    diff -r before/ after/                                 # nothing may differ

Timings (`elapsed_us`) are the only values blanked: they are measurements, not answers. Everything else (JSON
bytes, CSV, SVG, NDJSON batch lines, problem documents, status and content type) is written as received.
Standard library only.
"""
import json
import os
import re
import sys
import urllib.error
import urllib.request

from served import Server

ELAPSED = re.compile(rb'"elapsed_us":[-0-9.eE+]+')

P = {"probabilities": [0.1, 0.2, 0.3, 0.05, 0.5, 0.01, 0.0, 1.0], "groups": [{"size": 40, "probability": 0.02}]}
PP = {"probabilities": [0.02 * (i % 7 + 1) for i in range(300)], "poisson_rates": [1.5],
      "groups": [{"size": 500, "probability": 0.004}]}
FAM = {"families": [{"kind": "linear", "n": 200, "first": 0.001, "last": 0.05},
                    {"kind": "geometric", "n": 30, "first": 0.2, "ratio": 0.9}]}
DEP = {"model": "one_factor_gaussian", "rho": 0.15, "nodes": 12}
ALL = ["exact", "normal", "edgeworth", "poisson", "saddlepoint", "auto"]


def corpus():
    demo = json.load(open(os.path.join(os.path.dirname(__file__), "..", "fixtures", "demo-tail.json")))
    c = [("tail-demo", "/v1/tail", demo, {})]
    for name, port in [("p", P), ("pp", PP), ("fam", FAM)]:
        c += [
            (f"tail-{name}", "/v1/tail", {"portfolio": port, "thresholds": [0, 1, 3, 8, 20, 60], "methods": ALL}, {}),
            (f"tail-{name}-lower", "/v1/tail", {"portfolio": port, "thresholds": [2, 9], "side": "lower", "methods": ALL}, {}),
            (f"tail-{name}-point", "/v1/tail", {"portfolio": port, "thresholds": [2, 9], "side": "point", "methods": ALL}, {}),
            (f"tail-{name}-stress", "/v1/tail", {"portfolio": port, "thresholds": [5, 12], "stress": {"odds_factor": 1.7}, "methods": ["exact", "saddlepoint"]}, {}),
            (f"tail-{name}-dep", "/v1/tail", {"portfolio": port, "thresholds": [5, 12], "dependence": DEP, "methods": ["exact", "normal"]}, {}),
            (f"tail-{name}-tol", "/v1/tail", {"portfolio": port, "thresholds": [5, 40], "methods": ["auto"], "tolerance": {"absolute": 0.01}}, {}),
            (f"quant-{name}", "/v1/quantiles", {"portfolio": port, "levels": [0.01, 0.5, 0.99, 0.999999], "methods": ALL}, {}),
            (f"quant-{name}-sd", "/v1/quantiles", {"portfolio": port, "levels": [0.9, 0.999], "stress": {"probability_factor": 1.3}, "dependence": DEP}, {}),
            (f"dist-{name}", "/v1/distribution", {"portfolio": port}, {}),
            (f"dist-{name}-range", "/v1/distribution", {"portfolio": port, "from": 3, "to": 30, "stress": {"probability_factor": 0.5}}, {}),
            (f"dist-{name}-dep", "/v1/distribution", {"portfolio": port, "mass": 1e-6, "dependence": DEP}, {}),
            (f"dist-{name}-csv", "/v1/distribution", {"portfolio": port, "mass": 1e-9}, {"Accept": "text/csv"}),
            (f"layers-{name}", "/v1/layers", {"portfolio": port, "layers": [{"attachment": 0}, {"attachment": 3, "limit": 4}, {"attachment": 50, "limit": 10}], "tail_levels": [0.5, 0.99]}, {}),
            (f"layers-{name}-sd", "/v1/layers", {"portfolio": port, "layers": [{"attachment": 2, "limit": 5}], "tail_levels": [0.95], "stress": {"odds_factor": 2}, "dependence": DEP}, {}),
            (f"contrib-{name}", "/v1/contributions", {"portfolio": port, "threshold": 6}, {}),
            (f"contrib-{name}-top", "/v1/contributions", {"portfolio": port, "threshold": 3, "top": 5, "rank_by": "impact", "stress": {"probability_factor": 1.2}}, {}),
            (f"chart-{name}", "/v1/chart", {"portfolio": port, "threshold": 9, "methods": ["normal", "saddlepoint"]}, {}),
            (f"chart-{name}-log", "/v1/chart", {"portfolio": port, "threshold": 4, "side": "lower", "log_scale": True, "width": 500, "height": 300}, {}),
        ]
    units = {"probabilities": [0.05, 0.12, 0.3, 0.07, 0.2, 0.01, 1.0], "units": [12, 30, 4, 18, 8, 250, 3],
             "groups": [{"size": 40, "probability": 0.03, "units": 2}]}
    c += [
        ("tail-units", "/v1/tail", {"portfolio": units, "thresholds": [0, 3, 4, 60, 61, 300, 405], "methods": ["exact", "normal"]}, {}),
        ("tail-units-sides", "/v1/tail", {"portfolio": units, "thresholds": [20, 21], "side": "point", "stress": {"odds_factor": 2}}, {}),
        ("units-distribution", "/v1/distribution", {"portfolio": units}, {}),
        ("bad-units", "/v1/contributions", {"portfolio": units, "threshold": 3,
                                           "dependence": {"model": "one_factor_gaussian", "rho": 0.2}}, {}),
    ]
    bad = [
        ("bad-tail-thr", "/v1/tail", {"portfolio": P, "thresholds": []}),
        ("bad-tail-p", "/v1/tail", {"portfolio": {"probabilities": [0.5, 1.5, -1]}, "thresholds": [1], "methods": []}),
        ("bad-tail-tol", "/v1/tail", {"portfolio": P, "thresholds": [1], "tolerance": {"relative": -1}, "stress": {"probability_factor": -2}, "dependence": {"model": "one_factor_gaussian", "rho": 1.5, "nodes": 1}}),
        ("bad-tail-pois", "/v1/tail", {"portfolio": {"poisson_rates": [2]}, "thresholds": [10**12]}),
        ("bad-tail-unknown", "/v1/tail", {"portfolio": P, "thresholds": [1], "nope": 1}),
        ("bad-quant", "/v1/quantiles", {"portfolio": P, "levels": [0, 1, 0.5]}),
        ("bad-dist", "/v1/distribution", {"portfolio": P, "from": 5, "to": 2}),
        ("bad-dist-mass", "/v1/distribution", {"portfolio": P, "mass": 2, "from": 1}),
        ("bad-dist-big", "/v1/distribution", {"portfolio": {"groups": [{"size": 100000000, "probability": 0.5}]}, "mass": 1e-300}),
        ("bad-layers", "/v1/layers", {"portfolio": P}),
        ("bad-layers-lvl", "/v1/layers", {"portfolio": P, "layers": [{"attachment": 10**12}], "tail_levels": [1.5]}),
        ("bad-contrib-dep", "/v1/contributions", {"portfolio": P, "threshold": 10**12, "dependence": DEP}),
        ("bad-chart", "/v1/chart", {"portfolio": P, "threshold": 1, "methods": ["exact", "auto"], "width": 1}),
        ("bad-work", "/v1/tail", {"portfolio": {"families": [{"kind": "constant", "n": 5000000, "probability": 0.01}]}, "thresholds": list(range(1000))}),
        ("bad-chart-pois", "/v1/chart", {"portfolio": {"poisson_rates": [1]}, "threshold": 10**12}),
    ]
    c += [(n, path, b, {}) for n, path, b in bad]
    return c


BATCH = "\n".join([
    json.dumps({"id": 1, "tail": {"portfolio": P, "thresholds": [2, 5]}}),
    json.dumps({"id": "q", "quantiles": {"portfolio": PP, "levels": [0.99]}}),
    json.dumps({"id": 3, "distribution": {"portfolio": P, "from": 0, "to": 4}}),
    json.dumps({"id": 4, "layers": {"portfolio": P, "layers": [{"attachment": 1, "limit": 2}]}}),
    json.dumps({"id": 5, "contributions": {"portfolio": P, "threshold": 2, "top": 2}}),
    json.dumps({"id": 6, "chart": {}}),
    json.dumps({"id": 7, "tail": {"portfolio": P, "thresholds": [-1]}}),
    "{not json",
    "",
    json.dumps({"tail": {}}),
]) + "\n"


def main():
    binary, out = sys.argv[1], sys.argv[2]
    os.makedirs(out, exist_ok=True)
    server = Server(binary)
    base = server.base
    try:
        items = [(n, p, json.dumps(b).encode(), {"Content-Type": "application/json", **h}) for n, p, b, h in corpus()]
        items.append(("batch", "/v1/batch", BATCH.encode(), {"Content-Type": "application/x-ndjson"}))
        for name, path, body, headers in items:
            req = urllib.request.Request(base + path, data=body, headers=headers, method="POST")
            try:
                with urllib.request.urlopen(req, timeout=120) as r:
                    status, ctype, data = r.status, r.headers.get("Content-Type"), r.read()
            except urllib.error.HTTPError as e:
                status, ctype, data = e.code, e.headers.get("Content-Type"), e.read()
            data = ELAPSED.sub(b'"elapsed_us":0', data)
            with open(os.path.join(out, name), "wb") as f:
                f.write(f"{status} {ctype}\n".encode() + data)
        for path in ["/openapi.json"]:
            with urllib.request.urlopen(base + path) as r:
                open(os.path.join(out, "openapi.json"), "wb").write(r.read())
        print(f"{len(items) + 1} answers written to {out}")
    finally:
        server.stop()


if __name__ == "__main__":
    main()
