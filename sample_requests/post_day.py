"""Post a day's parcels to a running demur server: every row of a labelled CSV (stdlib only).

The depot's held-out digits (``holdout-test.csv``: 64 pixel columns and a ``digit`` column)
stand in for a morning's parcels. Each row goes out with the case id ``parcel-<row>-digit<d>``
so the demo's stand-in reviewer (review_round.py) can key the digit a person would read; the
server never sees the ``digit`` column. Prints how many parcels were sorted automatically and
how many were referred to a person.

    DEMUR_URL=http://127.0.0.1:8600 python sample_requests/post_day.py build/demo/holdout-test.csv
"""

from __future__ import annotations

import csv
import json
import os
import sys
import urllib.error
import urllib.request

URL = os.environ.get("DEMUR_URL", "http://127.0.0.1:8600").rstrip("/")
TOKEN = os.environ.get("DEMUR_TOKEN", "")
BATCH = 32


def post(cases: list[list[float]], ids: list[str]) -> dict:
    req = urllib.request.Request(URL + "/v1/predict", data=json.dumps({"cases": cases, "case_ids": ids}).encode(),
                                 method="POST", headers={"Content-Type": "application/json"})
    if TOKEN:
        req.add_header("Authorization", f"Bearer {TOKEN}")
    try:
        with urllib.request.urlopen(req, timeout=60) as resp:
            return json.loads(resp.read())
    except urllib.error.HTTPError as exc:
        raise SystemExit(f"predict failed: HTTP {exc.code}: {exc.read().decode(errors='replace')}") from None


def main(path: str) -> int:
    with open(path, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    features = [c for c in rows[0] if c != "digit"]
    counts = {"accept": 0, "abstain": 0}
    reasons = {"outside the training data": 0, "score": 0}
    for start in range(0, len(rows), BATCH):
        chunk = rows[start:start + BATCH]
        body = post([[float(r[c]) for c in features] for r in chunk],
                     [f"parcel-{start + i}-digit{r['digit']}" for i, r in enumerate(chunk)])
        for r in body["results"]:
            counts[r["decision"]] += 1
            if r["decision"] == "abstain":
                reasons["outside the training data" if "outside" in r["reason"] else "score"] += 1
    n = sum(counts.values())
    print(f"  {n} parcels: {counts['accept']} sorted automatically, {counts['abstain']} referred to a person "
          f"({100 * counts['abstain'] / n:.1f}%: {reasons['score']} too uncertain, "
          f"{reasons['outside the training data']} unlike the training data)")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1] if len(sys.argv) > 1 else "build/demo/holdout-test.csv"))
