"""Schemathesis hooks for scripts/acceptance.sh (SCHEMATHESIS_HOOKS=acceptance_hooks): keep the generated
bodies that also meet the rules between fields that the OpenAPI document states in words but JSON Schema
cannot (list lengths that must agree, a sum, an order). The second table of acceptance.sh measures what the
service refuses beyond them: the work and memory budgets, and any rule the document forgets."""

import math

import schemathesis

POISSON_RATE = 1e9  # the largest total Poisson rate (portfolio::Limits), stressed rates included
MAX_THRESHOLDS = 10_000  # --max-thresholds at its default
MAX_LISTED = 10_000_000  # --max-listed-exposures: probabilities plus the families' members
MAX_TOTAL = 1_000_000_000  # --max-total-exposures: those plus the groups' sizes


def _portfolio_ok(body: dict) -> bool:
    p = body.get("portfolio")
    if not isinstance(p, dict):
        return True
    n = len(p.get("probabilities") or [])
    # `ids`, `loadings` and `units`: one per entry of `probabilities`, or none.
    for key in ("ids", "loadings", "units"):
        if p.get(key) and len(p[key]) != n:
            return False
    families = p.get("families") or []
    listed = n + sum(len(f.get("scores") or []) if f.get("kind") == "logistic" else f.get("n", 0) for f in families)
    if listed > MAX_LISTED or listed + sum(g.get("size", 0) for g in p.get("groups") or []) > MAX_TOTAL:
        return False
    stress = body.get("stress") or {}
    factor = max([1.0] + [float(v) for v in stress.values() if isinstance(v, (int, float))])
    if float(sum(p.get("poisson_rates") or [])) * factor > POISSON_RATE:
        return False
    # A geometric severity: `largest` >= `first` (map_body sets it; generated bodies it did not reach are dropped).
    for src in p.get("compound_sources") or []:
        sev = src.get("severity") if isinstance(src, dict) else None
        if isinstance(sev, dict) and sev.get("kind") == "geometric":
            first, largest = sev.get("first"), sev.get("largest")
            if isinstance(first, int) and isinstance(largest, int) and largest < first:
                return False
    for f in p.get("families") or []:
        if f.get("kind") == "logistic":
            try:
                if not all(math.isfinite(f["intercept"] + f["slope"] * s) for s in f.get("scores") or []):
                    return False
            except OverflowError:
                return False
    return True


@schemathesis.hook
def map_body(context, body):
    """A geometric severity's `largest` not below its `first`, and a listed severity's probabilities sum to 1 (within 1e-9) and pair with its sizes: a rule between values
    that JSON Schema cannot state; make generated ones meet it (equal weights over the sizes given)."""
    p = body.get("portfolio") if isinstance(body, dict) else None
    for src in (p.get("compound_sources") or []) if isinstance(p, dict) else []:
        sev = src.get("severity") if isinstance(src, dict) else None
        if isinstance(sev, dict) and sev.get("kind") == "listed" and isinstance(sev.get("sizes"), list):
            n = len(sev["sizes"])
            sev["probabilities"] = [1.0 / n] * n if n else []
        elif isinstance(sev, dict) and sev.get("kind") == "geometric":
            # `largest` >= `first`, and at most MAX_SEVERITY_SIZES sizes between them.
            first, step = sev.get("first"), sev.get("step")
            if isinstance(first, int) and isinstance(step, int) and step > 0:
                sev["largest"] = min(first + 10 * step, 1_000_000_000) if first <= 1_000_000_000 else first
    return body


@schemathesis.hook
def filter_body(context, body) -> bool:
    if not isinstance(body, dict):
        return True
    if not _portfolio_ok(body):
        return False
    # /v1/distribution: `to` >= `from`, the range no longer than --max-thresholds.
    a, b = body.get("from"), body.get("to")
    if isinstance(a, (int, float)) and isinstance(b, (int, float)) and not (a <= b < a + MAX_THRESHOLDS):
        return False
    return True
