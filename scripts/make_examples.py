"""Answer the OpenAPI document's example requests with the service itself, so that its response examples are
real answers: openapi/examples/requests.json in, openapi/examples/responses.json out (JSON operations; through
`tailtally eval`, the batch format, which answers exactly as the routes do).

    python3 scripts/make_examples.py target/release/tailtally
    cargo run -- openapi > openapi/openapi.json

tests/openapi_examples.rs checks that the served answers still equal them; tests/python_client/check_client.py
checks the same through the generated Python client.
"""

import json
import pathlib
import subprocess
import sys

ROOT = pathlib.Path(__file__).resolve().parent.parent
BATCH_KINDS = ("tail", "quantiles", "distribution", "layers", "contributions", "reverse_stress")


def main() -> None:
    binary = sys.argv[1] if len(sys.argv) > 1 else str(ROOT / "target/release/tailtally")
    requests = json.loads((ROOT / "openapi/examples/requests.json").read_text())
    lines = "".join(json.dumps({"id": k, k: requests[k]}) + "\n" for k in BATCH_KINDS)
    # `eval` answers as the routes do (the same analytics, the same encoding).
    out = subprocess.run([binary, "eval"], input=lines, capture_output=True, text=True, check=True).stdout
    responses = {}
    for line in out.splitlines():
        answer = json.loads(line)
        name = answer["id"]
        if name not in answer:
            sys.exit(f"{name}: not answered: {line}")
        responses[name] = answer[name]
    # The batch: its example lines (one of them refused, to show a problem line) and their answer lines.
    lines = "".join(json.dumps(line) + "\n" for line in requests["batch"])
    out = subprocess.run([binary, "eval"], input=lines, capture_output=True, text=True, check=True).stdout
    responses["batch"] = [json.loads(line) for line in out.splitlines()]
    path = ROOT / "openapi/examples/responses.json"
    path.write_text(json.dumps(responses, indent=1) + "\n")
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
