#!/usr/bin/env bash
# Post the demo's sample requests to a running `demur serve` and print each decision.
#   DEMUR_URL   server address (default http://127.0.0.1:8600)
#   DEMUR_TOKEN bearer token, only if the server requires one for predict
#   PYTHON      interpreter for the printer (default python3)
# Usage: sample_requests/send.sh [FILE.json ...]   (default: clear ambiguous corrupted batch named)
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
url="${DEMUR_URL:-http://127.0.0.1:8600}"
py="${PYTHON:-python3}"
if [ "$#" -eq 0 ]; then
  set -- "$here/clear.json" "$here/ambiguous.json" "$here/corrupted.json" "$here/batch.json" "$here/named.json"
fi
auth=()
if [ -n "${DEMUR_TOKEN:-}" ]; then auth=(-H "Authorization: Bearer ${DEMUR_TOKEN}"); fi

for file in "$@"; do
  echo "== $(basename "$file") -> $url/v1/predict"
  curl -sS --max-time 30 -X POST -H 'Content-Type: application/json' "${auth[@]}" \
       --data-binary "@$file" "$url/v1/predict" | "$py" -c '
import json, sys
body = json.load(sys.stdin)
if "error" in body:
    e = body["error"]
    print(f"  error {e['"'"'code'"'"']} ({e['"'"'field'"'"']}): {e['"'"'message'"'"']}")
    sys.exit(0)
m = body["model"]
print(f"  model {m['"'"'name'"'"']} {m['"'"'version'"'"']} ({m['"'"'checksum'"'"'][:12]}), {body['"'"'draws'"'"']} draws")
for r in body["results"]:
    top = max(r["mean"]) if isinstance(r["mean"], list) else r["mean"]
    u = r["uncertainty"]
    review = r.get("review_id") or (r.get("review") or {}).get("reason", "")
    print(f"  {str(r['"'"'case_id'"'"']):32} {r['"'"'decision'"'"']:8} predicts {r['"'"'prediction'"'"']!s:>3} "
          f"p={top:.3f} MI={u['"'"'mutual_information'"'"']:.3g} {u['"'"'unit'"'"']}  [{r['"'"'reason'"'"']}]"
          + (f"  review: {review}" if review else ""))
'
done
