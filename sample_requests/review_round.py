"""A human-review round against a running demur server (stdlib only).

Claims the waiting cases one by one (``DEMUR_REVIEW_COUNT``, default 1), draws the first 8x8
digit in the terminal, shows the model's view, keys a label, then exports the decided cases
as JSON lines.

In real use a person at the depot looks at the digit and keys what they read.
The demo has no person, so it keys the digit recorded in the sample's case id
("...-digit8"), which is the label scikit-learn's dataset gives that image.

    DEMUR_URL=http://127.0.0.1:8600 DEMUR_TOKEN=... python sample_requests/review_round.py
"""

from __future__ import annotations

import json
import os
import re
import sys
import urllib.error
import urllib.request

URL = os.environ.get("DEMUR_URL", "http://127.0.0.1:8600").rstrip("/")
TOKEN = os.environ.get("DEMUR_TOKEN", "")
SHADES = " .:-=+*#%@"


def call(method: str, path: str, body: dict | None = None) -> tuple[int, bytes]:
    data = None if body is None else json.dumps(body).encode()
    req = urllib.request.Request(URL + path, data=data, method=method)
    req.add_header("Authorization", f"Bearer {TOKEN}")
    if data is not None:
        req.add_header("Content-Type", "application/json")
    try:
        with urllib.request.urlopen(req, timeout=30) as resp:
            return resp.status, resp.read()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read()


def draw(values: list[float]) -> str:
    rows = []
    for r in range(8):
        row = values[r * 8:(r + 1) * 8]
        rows.append("    " + "".join(SHADES[min(9, int(v / 16.0 * 9.99))] * 2 for v in row))
    return "\n".join(rows)


def main() -> int:
    count = int(os.environ.get("DEMUR_REVIEW_COUNT", "1"))
    keyed = {"audit": 0, "abstain": 0}
    for n in range(count):
        done = review_one(show=n == 0)
        if done is None:
            break
        keyed[done] += 1
    print(f"  keyed {sum(keyed.values())} case(s): {keyed['abstain']} referred by the model, {keyed['audit']} "
          "audit samples of accepted parcels")
    status, raw = call("GET", "/v1/reviews/export?format=jsonl")
    lines = [ln for ln in raw.decode().splitlines() if ln.strip()]
    print(f"  export: {len(lines)} decided case(s) ready for recalibration and retraining")
    status, raw = call("GET", "/v1/reviews/summary")
    if status == 200:
        print(f"  queue: {json.loads(raw).get('counts')}")
    return 0


def review_one(show: bool) -> str | None:
    """Claim, (show,) key; return the item's kind, or None when nothing waits."""
    status, raw = call("POST", "/v1/reviews/claim", {})
    if status != 200:
        raise SystemExit(f"  claim failed: HTTP {status}: {raw.decode(errors='replace')}")
    body = json.loads(raw)
    item = body.get("item")
    if not item:
        print("  nothing more waiting for review")
        return None
    case = item.get("case") or {}
    values = case.get("values") if isinstance(case, dict) else case
    summary = item.get("summary") or {}
    if show:
        print(f"  claimed {item['id']} (client case {item.get('client_case_id')}, kind {item.get('kind')})")
        if values and len(values) == 64:
            print(draw([float(v) for v in values]))
        print(f"  model's view: predicts {item.get('prediction')}, "
              f"MI {summary.get('uncertainty', {}).get('mutual_information', float('nan')):.4f} nats (advice only)")
    match = re.search(r"digit(\d)", str(item.get("client_case_id") or ""))
    label = match.group(1) if match else str(item.get("prediction"))
    status, raw = call("POST", f"/v1/reviews/{item['id']}/decision",
                       {"label": label, "note": "demo: keyed from the sample's known digit"})
    if status != 200:
        raise SystemExit(f"  decision failed: HTTP {status}: {raw.decode(errors='replace')}")
    if show:
        print(f"  keyed label {label}")
    return str(item.get("kind"))


if __name__ == "__main__":
    sys.exit(main())
