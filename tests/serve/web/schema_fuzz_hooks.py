"""Schemathesis hooks for tests/serve/web/test_schema_fuzz.py (loaded via SCHEMATHESIS_HOOKS).

Two rules of ``POST /v1/predict`` that JSON Schema cannot state are written in the API
document's words instead (``case_ids``: exactly one entry per case, no string twice;
the server answers another length or a repeat with a 400 naming the field). So that the
fuzzer's *positive* bodies are the bodies the document means, this hook brings their
``case_ids`` to one per case (dropping extras, padding with null) and turns repeats into
null. Negative bodies are left exactly as generated.
"""

from __future__ import annotations

from typing import Any

import schemathesis


@schemathesis.hook
def map_case(context: Any, case: Any) -> Any:
    meta = getattr(case, "meta", None)
    positive = meta is not None and meta.generation.mode.is_positive
    if not positive or case.operation.path != "/v1/predict" or case.method.upper() != "POST":
        return case
    body = case.body
    if not isinstance(body, dict) or not isinstance(body.get("case_ids"), list) or not isinstance(body.get("cases"), list):
        return case
    n = len(body["cases"])
    ids = list(body["case_ids"][:n]) + [None] * max(0, n - len(body["case_ids"]))
    seen: set[str] = set()
    for i, cid in enumerate(ids):
        if isinstance(cid, str):
            if cid in seen:
                ids[i] = None
            seen.add(cid)
    case.body = {**body, "case_ids": ids}
    return case
