"""The request boundary: a predict body -> a typed ``PredictRequest``, or an
``InvalidInput`` that names the offending field and says what was expected.

Accepted body (``POST /v1/predict``)::

    {"cases": [...], "case_ids": [...]}      # case_ids optional, strings or null

Each case is one of
  * a flat list of prod(shape) numbers, in the order of ``inputs.names``;
  * a nested list of the bundle's input shape, or of that shape without its
    size-1 axes (a [1, 8, 8] digit as [[[8 numbers] x 8]] or as an 8x8 grid);
    a flat image input of square size ([64]) also takes its square grid (8x8);
  * an object keyed by feature name (every name required, no unknown names).

Why two paths: the happy path converts the whole batch with one
``np.asarray(..., dtype=float64)`` and checks types, finiteness and the
float32 range with C-level operations (``map(type, ...)`` over a flattened
iterator, ``np.isfinite``), so a 1,024-case batch never runs Python bytecode
per number. Only when that fails does the slow path walk the offending case
to find the exact element for the message ("'cases[2][5]' must be a finite
number; got NaN"). Both paths accept the same inputs.

Rejected: bools (JSON true/false are not numbers here), strings (even
numeric ones), null, objects where numbers belong, nesting deeper than the
input shape, NaN, +-Infinity, and magnitudes beyond float32 (about 3.4e38).
"""

from __future__ import annotations

import difflib
import json
import math
import re
from dataclasses import dataclass
from itertools import chain
from typing import Any

import numpy as np
import orjson

from demur.serve.core.bundle import F32_LIMIT, InputSpec
from demur.serve.core.npy_body import ArrayBody, validate_array
from demur.serve.errors import InvalidInput, PayloadTooLarge

__all__ = ["BODY_KEYS", "MAX_CASE_ID_CHARS", "PredictRequest", "client_text", "parse_json", "validate_predict"]

BODY_KEYS = ("cases", "case_ids")
"""Top-level keys a predict body may hold; any other key is refused (a typo should not pass silently)."""

MAX_CASE_ID_CHARS = 200
"""Longest client case id accepted (characters)."""

_BAD_TEXT = re.compile("[\x00-\x1f\x7f-\x9f\ud800-\udfff]")
"""What no client text may hold: C0 and C1 control characters (NUL included) and lone
surrogates (U+D800..U+DFFF are not Unicode scalar values, so no UTF-8 form exists;
Unicode 15, section 3.9, D76). A store cannot encode them, a log line or a CSV cell
is corrupted by them."""
_BAD_MULTILINE = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\ud800-\udfff]")
"""The same for multi-line text (reviewer notes): tab and line feed are allowed."""
_NUMBER_TYPES = frozenset({int, float})
_HINT_NAMES = 50  # suggest a feature name for a typo only when the case lacks at most this many


@dataclass(frozen=True)
class PredictRequest:
    """A validated predict request.

    ``x``: float32[B, *inputs.shape], raw (not standardised) feature values.
    ``case_ids``: B entries, the client's id per case or ``None``.
    """

    x: np.ndarray
    case_ids: list[str | None]

    @property
    def size(self) -> int:
        """B, the number of cases."""
        return int(self.x.shape[0])


def parse_json(data: bytes) -> Any:
    """Parse a request body; ``InvalidInput`` naming ``body`` when it is not JSON.

    orjson first (fast, strict). Its refusals that the standard library
    accepts (the non-standard NaN / Infinity literals, integers past 64 bits)
    are parsed again with ``json`` so validation can name the exact element
    instead of blaming the whole body.
    """
    if not data:
        raise InvalidInput("body is empty; expected a JSON object like {\"cases\": [...]}", field="body")
    try:
        return orjson.loads(data)
    except orjson.JSONDecodeError as exc:
        first = str(exc)
    try:
        return json.loads(data)
    except RecursionError:
        raise InvalidInput("body nests too deeply to be a predict request", field="body") from None
    except (ValueError, UnicodeDecodeError):
        raise InvalidInput(f"body is not valid JSON: {first}", field="body") from None


def validate_predict(body: Any, spec: InputSpec, max_cases: int) -> PredictRequest:
    """Check a parsed predict body against the bundle's ``InputSpec``.

    Raises ``InvalidInput`` (400) naming the field, or ``PayloadTooLarge``
    (413) when there are more than ``max_cases`` cases.

    Example::

        req = validate_predict({"cases": [[0.0] * 64]}, manifest.inputs, 1024)
        req.x.shape    # (1, 64) for a flat spec, (1, 1, 8, 8) for an image spec
    """
    if isinstance(body, ArrayBody):  # the binary body (serve/core/npy_body.py): cases only, no ids
        x = validate_array(body, spec, max_cases)
        return PredictRequest(x=x, case_ids=[None] * len(x))
    if not isinstance(body, dict):
        raise InvalidInput(
            f"body must be a JSON object like {{\"cases\": [...]}}; got {_kind(body)}", field="body"
        )
    for key in body:
        if key not in BODY_KEYS:
            raise InvalidInput(
                f"'{_clip(key)}' is not a field of a predict request; expected 'cases' and optionally 'case_ids'",
                field=_clip(key),
            )
    if "cases" not in body:
        raise InvalidInput("'cases' is required: a list of cases", field="cases")
    cases = body["cases"]
    if not isinstance(cases, list):
        raise InvalidInput(f"'cases' must be a list of cases; got {_kind(cases)}", field="cases")
    if not cases:
        raise InvalidInput("'cases' must not be empty", field="cases")
    if len(cases) > max_cases:
        raise PayloadTooLarge(
            f"'cases' holds {len(cases)} cases; at most {max_cases} per request", field="cases"
        )
    case_ids = _case_ids(body.get("case_ids"), len(cases))
    x = _fast(cases, spec)
    if x is None:
        x = _slow(cases, spec)
    return PredictRequest(x=x, case_ids=case_ids)


# --- client text ------------------------------------------------------------------------


def client_text(value: Any, field: str, *, max_chars: int, multiline: bool = False) -> str:
    """``value`` if it is client text a store, a log and a spreadsheet can all hold; else
    ``InvalidInput`` naming ``field``.

    Every text a client sends that reaches the review store goes through here (case ids
    in predict, labels, notes and item ids in the reviewer API): a string of 1 to
    ``max_chars`` characters, valid Unicode (no lone surrogates), no control characters
    (NUL, C0, DEL, C1; ``multiline`` allows tab and line feed). The message shows the
    offending character's code point, never the character itself.

    Example::

        client_text("parcel-0042", "case_ids[3]", max_chars=200)     # -> "parcel-0042"
        client_text("a\x00b", "case_ids[3]", max_chars=200)          # InvalidInput: U+0000 at 1
    """
    if not isinstance(value, str):
        raise InvalidInput(f"'{field}' must be a string; got {_kind(value)}", field=field)
    if not 0 < len(value) <= max_chars:
        raise InvalidInput(f"'{field}' must have 1 to {max_chars} characters; got {len(value)}", field=field)
    bad = (_BAD_MULTILINE if multiline else _BAD_TEXT).search(value)
    if bad is not None:
        ch = bad.group()
        what = "a lone surrogate (not valid Unicode)" if "\ud800" <= ch <= "\udfff" else (
            "a control character" if ch != "\x00" else "the NUL character")
        raise InvalidInput(f"'{field}' holds {what}, U+{ord(ch):04X} at position {bad.start()}; "
                           "send printable Unicode text", field=field)
    return value


# --- case ids ---------------------------------------------------------------------------


def _case_ids(raw: Any, n: int) -> list[str | None]:
    if raw is None:
        return [None] * n
    if not isinstance(raw, list):
        raise InvalidInput(f"'case_ids' must be a list of strings or null; got {_kind(raw)}", field="case_ids")
    if len(raw) != n:
        raise InvalidInput(f"'case_ids' must have one entry per case ({n}); got {len(raw)}", field="case_ids")
    seen: dict[str, int] = {}
    for i, cid in enumerate(raw):
        if cid is None:
            continue
        if not isinstance(cid, str):
            raise InvalidInput(f"'case_ids[{i}]' must be a string or null; got {_kind(cid)}", field=f"case_ids[{i}]")
        client_text(cid, f"case_ids[{i}]", max_chars=MAX_CASE_ID_CHARS)
        if cid in seen:
            raise InvalidInput(
                f"'case_ids[{i}]' repeats '{_clip(cid)}' (first at case_ids[{seen[cid]}]); ids must be unique",
                field=f"case_ids[{i}]",
            )
        seen[cid] = i
    return list(raw)


# --- fast path: whole batch at once ----------------------------------------------------


def _fast(cases: list[Any], spec: InputSpec) -> np.ndarray | None:
    """float32[B, *shape], or None when anything is off (the slow path then names it)."""
    if isinstance(cases[0], dict):
        rows = _rows_from_objects(cases, spec)
        if rows is None:
            return None
        cases = rows
    try:
        arr = np.asarray(cases, dtype=np.float64)
    except (ValueError, TypeError, OverflowError):
        return None
    shape = tuple(spec.shape)
    if arr.shape[1:] not in _forms(spec):
        return None
    flat: Any = cases
    for _ in range(arr.ndim - 1):
        flat = chain.from_iterable(flat)
    if not set(map(type, flat)) <= _NUMBER_TYPES:
        return None
    if not np.isfinite(arr).all() or np.abs(arr).max(initial=0.0) >= F32_LIMIT:
        return None
    return arr.astype(np.float32).reshape((len(cases), *shape))


def _rows_from_objects(cases: list[Any], spec: InputSpec) -> list[list[Any]] | None:
    """Feature-keyed cases as lists in ``spec.names`` order (one C-level map per case)."""
    names = spec.names
    wanted = frozenset(names)
    rows: list[list[Any]] = []
    for case in cases:
        if not isinstance(case, dict) or case.keys() != wanted:
            return None
        rows.append(list(map(case.__getitem__, names)))
    return rows


# --- slow path: find the element to blame ----------------------------------------------


def _slow(cases: list[Any], spec: InputSpec) -> np.ndarray:
    """Validate case by case; raise at the first problem. Also assembles batches
    that mix forms (one case flat, another nested), which the fast path refuses."""
    out = np.empty((len(cases), *spec.shape), dtype=np.float32)
    for i, case in enumerate(cases):
        out[i] = _one_case(case, f"cases[{i}]", spec)
    return out


def _one_case(case: Any, path: str, spec: InputSpec) -> np.ndarray:
    shape = tuple(spec.shape)
    if isinstance(case, dict):
        _check_names(case, path, spec)
        values = [case[name] for name in spec.names]
        for name, value in zip(spec.names, values):
            _check_number(value, f"{path}.{name}")
        return np.asarray(values, dtype=np.float64).astype(np.float32).reshape(shape)
    if not isinstance(case, list):
        raise InvalidInput(
            f"'{path}' must be a list of {spec.size} numbers, a nested list of shape {list(shape)} "
            f"or an object keyed by feature name; got {_kind(case)}",
            field=path,
        )
    depth, probe = 1, case
    while isinstance(probe, list) and probe and isinstance(probe[0], list):
        depth, probe = depth + 1, probe[0]
    dims = next((form for form in _forms(spec) if len(form) == depth), shape if depth > 1 else (spec.size,))
    _check_nested(case, path, dims)
    return np.asarray(case, dtype=np.float64).astype(np.float32).reshape(shape)


def _check_names(case: dict[str, Any], path: str, spec: InputSpec) -> None:
    known = set(spec.names)
    missing = [name for name in spec.names if name not in case]
    for key in case:
        if key not in known:
            # a typo: the closest of the few names the case lacks (bounded work on hostile keys)
            near = difflib.get_close_matches(_clip(key), missing, n=1) if len(missing) <= _HINT_NAMES else []
            hint = f"; did you mean '{near[0]}'?" if near else ""
            raise InvalidInput(f"'{path}.{_clip(key)}' is not a feature of this model{hint}",
                               field=f"{path}.{_clip(key)}")
    if missing:
        more = f" (and {len(missing) - 1} more)" if len(missing) > 1 else ""
        raise InvalidInput(
            f"'{path}' is missing feature '{missing[0]}'{more}; every one of the {spec.size} features is required",
            field=f"{path}.{missing[0]}",
        )


def _check_nested(value: Any, path: str, dims: tuple[int, ...]) -> None:
    if not dims:
        _check_number(value, path)
        return
    if not isinstance(value, list):
        raise InvalidInput(f"'{path}' must be a list of {dims[0]} {_what(dims)}; got {_kind(value)}", field=path)
    if len(value) != dims[0]:
        raise InvalidInput(f"'{path}' must have {dims[0]} {_what(dims)}; got {len(value)}", field=path)
    for j, item in enumerate(value):
        _check_nested(item, f"{path}[{j}]", dims[1:])


def _check_number(value: Any, path: str) -> None:
    if type(value) not in _NUMBER_TYPES:
        raise InvalidInput(f"'{path}' must be a number; got {_kind(value)}", field=path)
    try:
        number = float(value)
    except OverflowError:
        raise InvalidInput(
            f"'{path}' is an integer with {len(str(abs(value)))} digits, outside the float32 range (about ±3.4e38)",
            field=path,
        ) from None
    if not math.isfinite(number):
        got = "NaN" if math.isnan(number) else ("Infinity" if number > 0 else "-Infinity")
        raise InvalidInput(f"'{path}' must be a finite number; got {got}", field=path)
    if abs(number) >= F32_LIMIT:
        raise InvalidInput(f"'{path}' is {number:.3g}, outside the float32 range (about ±3.4e38)", field=path)


def _forms(spec: InputSpec) -> tuple[tuple[int, ...], ...]:
    """Accepted shapes of one case: flat, the full input shape, the input shape
    without its size-1 axes (an 8x8 grid for a [1, 8, 8] digit), and the square
    grid of a flat image input ([64] -> 8x8)."""
    shape = tuple(spec.shape)
    squeezed = tuple(d for d in shape if d != 1) or (1,)
    forms = [(spec.size,), shape, squeezed]
    side = math.isqrt(spec.size)
    if spec.kind == "image" and len(shape) == 1 and side * side == spec.size:
        forms.append((side, side))  # a flat image model (the digits MLP) still takes its 8x8 grid
    return tuple(dict.fromkeys(forms))


def _what(dims: tuple[int, ...]) -> str:
    return "numbers" if len(dims) == 1 else "entries"


def _kind(value: Any) -> str:
    """JSON's name for what was received, with a short preview for strings."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return "a number"
    if isinstance(value, str):
        return f"the string {json.dumps(_clip(value))}"
    if isinstance(value, list):
        return f"a list of {len(value)}"
    if isinstance(value, dict):
        return "an object"
    return type(value).__name__


def _clip(text: str, limit: int = 40) -> str:
    text = str(text)
    return text if len(text) <= limit else text[: limit - 1] + "…"
