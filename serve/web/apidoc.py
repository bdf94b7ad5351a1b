"""The API document a server serves: serve/web/openapi.json bound to the model it serves.

The file states a case's forms in general ("a flat list of the input's numbers, or ...");
which lengths, nesting and feature names are right depends on the bundle serving. A
document that allowed every length would promise what the server must refuse, so
``GET /openapi.json`` answers the file with three places bound to the live model
(each marked ``x-demur-bound`` in the file):

- ``Case``: the exact forms ``validate_predict`` accepts for the live ``InputSpec``
  (serve/core/validation.py, ``_forms``): the flat list of ``size`` numbers, the input
  shape nested, the shape without its size-1 axes, the square grid of a flat image input,
  and the object with every feature name;
- ``PredictRequest.cases.maxItems``: the server's ``max_cases``;
- ``ReviewDecision``: ``label`` (an enum of the live labels) for a classifier, ``value``
  for a regression model.

Built once per model checksum. Before a model is loaded the file is served as it is.
Everything else in the file is served unchanged.
"""

from __future__ import annotations

import copy
import json
import math
import threading
from typing import Any

from demur.serve.core.bundle import InputSpec

__all__ = ["bound_document", "case_schema"]

_NUMBER = {"$ref": "#/components/schemas/CaseNumber"}
_lock = threading.Lock()
_cache: dict[tuple[str, int], bytes] = {}


def _nested(dims: tuple[int, ...]) -> dict[str, Any]:
    schema: dict[str, Any] = _NUMBER
    for d in reversed(dims):
        schema = {"type": "array", "minItems": d, "maxItems": d, "items": schema}
    return schema


def case_schema(spec: InputSpec) -> dict[str, Any]:
    """The JSON Schema of one case for ``spec``: exactly the forms the validator accepts."""
    shape = tuple(int(d) for d in spec.shape)
    squeezed = tuple(d for d in shape if d != 1) or (1,)
    forms = [(spec.size,), shape, squeezed]
    side = math.isqrt(spec.size)
    if spec.kind == "image" and len(shape) == 1 and side * side == spec.size:
        forms.append((side, side))
    options = [_nested(dims) for dims in dict.fromkeys(forms)]
    names = list(spec.names)
    if names and len(set(names)) == len(names):
        options.append({"type": "object", "additionalProperties": False, "required": names,
                        "properties": {name: _NUMBER for name in names}})
    return {
        "description": (f"One case for the model serving: {spec.size} numbers, flat or nested as "
                        f"{list(shape)}" + (f" (or {list(squeezed)})" if squeezed != shape else "")
                        + (", or an object with every feature name" if names else "")),
        "anyOf": options,
    }


def _decision_schema(base: dict[str, Any], task: str, labels: list[str]) -> dict[str, Any]:
    schema = copy.deepcopy(base)
    props = schema["properties"]
    schema.pop("oneOf", None)
    schema.pop("x-demur-bound", None)
    if task == "classification":
        props.pop("value", None)
        props["label"] = {"type": "string", "enum": labels, "description": "one of the model's labels"}
        schema["required"] = ["label"]
    else:
        props.pop("label", None)
        schema["required"] = ["value"]
    return schema


def bound_document(raw: bytes, live: Any, max_cases: int) -> bytes:
    """``raw`` (the file's bytes) bound to ``live`` (the serving ``Live``; ``None``: unbound)."""
    if live is None:
        return raw
    key = (str(live.model["checksum"]), int(max_cases))
    with _lock:
        cached = _cache.get(key)
    if cached is not None:
        return cached
    doc = json.loads(raw)
    schemas = doc["components"]["schemas"]
    manifest = live.manifest
    schemas["Case"] = case_schema(manifest.inputs)
    schemas["PredictRequest"]["properties"]["cases"]["maxItems"] = int(max_cases)
    schemas["PredictRequest"]["properties"]["cases"].pop("x-demur-bound", None)
    schemas["ReviewDecision"] = _decision_schema(schemas["ReviewDecision"], manifest.task,
                                                 [str(label) for label in manifest.labels])
    out = json.dumps(doc, ensure_ascii=False).encode("utf-8")
    with _lock:
        if len(_cache) > 8:
            _cache.clear()
        _cache[key] = out
    return out
