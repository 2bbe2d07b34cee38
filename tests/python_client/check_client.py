"""Call every operation of the service through the Python client generated from openapi/openapi.json
(openapi-python-client), and check each answer against the document: the JSON operations' answers must equal
their documented response examples (timings aside, numbers to 1e-9 relative). The two bodies the generator
skips, the NDJSON batch and the SVG chart, go through plain httpx.

    python3 tests/python_client/check_client.py http://127.0.0.1:8080 openapi/openapi.json

Run by .ci/run after generating and installing the client (package `tailtally_client`).
"""

import json
import math
import sys

import httpx
from tailtally_client import Client
from tailtally_client.api.analytics import contributions, distribution, layers, quantiles, reverse_stress
from tailtally_client.api.operations import docs, explorer, healthz, metrics, readyz
from tailtally_client.api.probabilities import tail
from tailtally_client.models import (
    ContributionsRequest,
    ContributionsResponse,
    DistributionRequest,
    DistributionResponse,
    LayersRequest,
    LayersResponse,
    QuantilesRequest,
    QuantilesResponse,
    ReverseStressRequest,
    ReverseStressResponse,
    TailRequest,
    TailResponse,
)

JSON_OPERATIONS = {
    # path: (generated module, request model, response model)
    "/v1/tail": (tail, TailRequest, TailResponse),
    "/v1/quantiles": (quantiles, QuantilesRequest, QuantilesResponse),
    "/v1/distribution": (distribution, DistributionRequest, DistributionResponse),
    "/v1/layers": (layers, LayersRequest, LayersResponse),
    "/v1/contributions": (contributions, ContributionsRequest, ContributionsResponse),
    "/v1/reverse-stress": (reverse_stress, ReverseStressRequest, ReverseStressResponse),
}


def differs(want, got, at=""):
    """The first difference between the documented and the served value, or None (timings are not compared)."""
    if isinstance(want, bool) or isinstance(got, bool):
        return None if want == got else f"{at}: {want!r} documented, {got!r} served"
    if isinstance(want, (int, float)) and isinstance(got, (int, float)):
        ok = math.isclose(want, got, rel_tol=1e-9, abs_tol=0.0) or want == got
        return None if ok else f"{at}: {want!r} documented, {got!r} served"
    if isinstance(want, dict) and isinstance(got, dict):
        if sorted(want) != sorted(got):
            return f"{at}: keys {sorted(want)} documented, {sorted(got)} served"
        for k in want:
            if k != "elapsed_us" and (d := differs(want[k], got[k], f"{at}/{k}")):
                return d
        return None
    if isinstance(want, list) and isinstance(got, list) and len(want) == len(got):
        return next((d for i, (a, b) in enumerate(zip(want, got)) if (d := differs(a, b, f"{at}/{i}"))), None)
    return None if want == got else f"{at}: {want!r} documented, {got!r} served"


def main() -> int:
    base, doc_path = sys.argv[1], sys.argv[2]
    doc = json.load(open(doc_path))
    client = Client(base_url=base, timeout=httpx.Timeout(60.0))
    failures = []

    def check(name, problem):
        print(f"{'FAIL' if problem else 'ok  '} {name}{': ' + problem if problem else ''}")
        if problem:
            failures.append(name)

    for path, (module, request_model, response_model) in JSON_OPERATIONS.items():
        op = doc["paths"][path]["post"]
        example = op["requestBody"]["content"]["application/json"]["example"]
        want = op["responses"]["200"]["content"]["application/json"]["example"]
        body = request_model.from_dict(example)
        # The model writes back what it read: the generated types hold every documented field.
        problem = differs(example, body.to_dict(), "request")
        if not problem:
            res = module.sync_detailed(client=client, body=body)
            if res.status_code != 200:
                problem = f"status {res.status_code}: {res.content[:300]!r}"
            elif not isinstance(res.parsed, response_model):
                problem = f"parsed as {type(res.parsed).__name__}"
            else:
                problem = differs(want, res.parsed.to_dict(), "answer")
        check(f"POST {path} (generated client)", problem)

    # The chart answers SVG, which the generator does not parse: plain httpx.
    example = doc["paths"]["/v1/chart"]["post"]["requestBody"]["content"]["application/json"]["example"]
    res = httpx.post(f"{base}/v1/chart", json=example, timeout=60)
    svg = res.text
    problem = None
    if res.status_code != 200 or not res.headers["content-type"].startswith("image/svg+xml"):
        problem = f"status {res.status_code}, {res.headers.get('content-type')}"
    elif not (svg.lstrip().startswith("<svg") or "<svg" in svg[:200]) or not svg.rstrip().endswith("</svg>"):
        problem = "not an SVG document"
    check("POST /v1/chart (httpx, SVG)", problem)

    # The batch (NDJSON), which the generator skips: plain httpx, line by line against the documented lines.
    batch = doc["paths"]["/v1/batch"]["post"]
    lines = batch["requestBody"]["content"]["application/x-ndjson"]["example"]
    want = [json.loads(x) for x in batch["responses"]["200"]["content"]["application/x-ndjson"]["example"].splitlines()]
    res = httpx.post(f"{base}/v1/batch", content=lines, headers={"content-type": "application/x-ndjson"}, timeout=60)
    problem = f"status {res.status_code}" if res.status_code != 200 else None
    problem = problem or differs(want, [json.loads(x) for x in res.text.splitlines()], "answer")
    check("POST /v1/batch (httpx, NDJSON)", problem)

    # The probes and the service's documents, through the generated client.
    for name, module, expect in [
        ("GET /healthz", healthz, None),
        ("GET /readyz", readyz, None),
        ("GET /metrics", metrics, b"# TYPE"),
        ("GET /docs", docs, b"<html"),
        ("GET /", explorer, b"<html"),
    ]:
        res = module.sync_detailed(client=client)
        problem = None
        if res.status_code != 200:
            problem = f"status {res.status_code}"
        elif expect and expect.lower() not in res.content.lower():
            problem = f"{expect!r} not in the answer"
        check(f"{name} (generated client)", problem)

    covered = {"/v1/chart", "/v1/batch", "/healthz", "/readyz", "/metrics", "/docs", "/"} | set(JSON_OPERATIONS)
    missing = set(doc["paths"]) - covered
    check("every documented path called", f"not called: {sorted(missing)}" if missing else None)
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
