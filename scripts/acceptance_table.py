"""Per operation, the share of recorded requests answered 200 (a HAR file written by Schemathesis).

    python3 scripts/acceptance_table.py cases.har 0.8

Prints a table (operation, body type, cases, share 200, the other statuses) and exits 1 when an operation's
share is below the threshold, JSON and multipart bodies each on their own.
"""

import collections
import json
import sys
from urllib.parse import urlparse


def main() -> int:
    har_path, threshold = sys.argv[1], float(sys.argv[2])
    entries = json.load(open(har_path))["log"]["entries"]
    statuses: dict[tuple[str, str], collections.Counter] = collections.defaultdict(collections.Counter)
    for e in entries:
        req = e["request"]
        mime = (req.get("postData") or {}).get("mimeType", "")
        kind = "multipart" if mime.startswith("multipart/") else "json"
        statuses[(f"{req['method']} {urlparse(req['url']).path}", kind)][e["response"]["status"]] += 1
    failed = []
    print(f"{'operation':<26} {'body':<10} {'cases':>5} {'200':>6}  other statuses")
    for (op, kind), counts in sorted(statuses.items()):
        total = sum(counts.values())
        rate = counts[200] / total
        others = ", ".join(f"{s}: {n}" for s, n in sorted(counts.items()) if s != 200)
        print(f"{op:<26} {kind:<10} {total:>5} {rate:>6.0%}  {others}")
        if rate < threshold:
            failed.append(f"{op} ({kind})")
    if failed:
        print(f"below {threshold:.0%} answered 200: {', '.join(failed)}")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
