"""The reviewer's routes: the API under ``/v1/reviews`` and the page at ``/review``.

Every ``/v1/reviews`` route needs a bearer token with the ``review`` scope
(``admin`` implies it; see serve/web/auth.py). The reviewer is the token's
fingerprint, so a claim belongs to a token, and only that token (or an admin)
can decide or release it.

==========================================  ============================================
route                                       what it does
==========================================  ============================================
GET  /v1/reviews?status=&kind=&limit=&after=  items oldest first, brief (no inputs); ``next`` cursor
POST /v1/reviews/claim   {"skip": [ids]}     claim the oldest waiting item for the lease
GET  /v1/reviews/<id>                        one item in full (case, model's view, decision)
POST /v1/reviews/<id>/decision               {"label": "7"} or {"value": 3.2}, optional "note"
POST /v1/reviews/<id>/release                give the claim back
GET  /v1/reviews/summary                     counts by status, accuracy estimates, who you are
GET  /v1/reviews/export?format=jsonl|csv     decided items for retraining
GET  /review                                 the reviewer's page (no token needed to load it)
==========================================  ============================================

The page is plain HTML with its script and style in separate files
(``/review/assets/...``), so its Content-Security-Policy allows no inline
code at all.
"""

from __future__ import annotations

import csv
import io
import math
import re
from pathlib import Path
from typing import Any

import orjson
from flask import Blueprint, Response, g, request
from werkzeug.routing import BaseConverter

from demur.serve.web.auth import require
from demur.serve.web.limits import SECURITY_HEADERS
from demur.serve.errors import InvalidInput, NotFound
from demur.serve.review.store import KINDS, MAX_EXCLUDE, MAX_NOTE_CHARS, STATUSES, ReviewItem
from demur.serve.core.validation import client_text, parse_json

__all__ = ["PAGE_HEADERS", "ItemIdConverter", "install_review_api", "make_blueprint"]

PAGE_HEADERS: dict[str, str] = {
    "Content-Security-Policy": SECURITY_HEADERS["Content-Security-Policy"],  # the one policy of every response
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "X-Frame-Options": "DENY",
    "Cache-Control": "no-store",
}
"""Headers on the page and its assets (common practice, from memory of the OWASP
secure-headers project): no inline script or style, nothing from elsewhere, no framing."""

STATIC_DIR = Path(__file__).with_name("static")
_ASSETS = {"review.html": "text/html", "review.js": "text/javascript", "review.css": "text/css"}
"""The page's files, read once into memory (a few kB) and served by name only."""

MAX_LIMIT = 500
MAX_EXPORT = 200_000
MAX_LABEL_CHARS = 200


def _json(payload: Any, status: int = 200) -> Response:
    response = Response(orjson.dumps(payload), status=status, mimetype="application/json")
    response.headers["Cache-Control"] = "no-store"
    return response


def _int_arg(name: str, default: int, low: int, high: int) -> int:
    raw = request.args.get(name)
    if raw is None:
        return default
    try:
        value = int(raw)
    except ValueError:
        raise InvalidInput(f"'{name}' must be an integer in {low}..{high}; got '{raw[:40]}'", field=name) from None
    if not low <= value <= high:
        raise InvalidInput(f"'{name}' must be in {low}..{high}; got {value}", field=name)
    return value


def _choice_arg(name: str, choices: tuple[str, ...], default: str | None) -> str | None:
    """The query parameter, one of ``choices``; absent: ``default``. Given empty (``?status=``)
    is refused like any other value not in the list: the API document allows no empty value."""
    raw = request.args.get(name)
    if raw is None:
        return default
    if raw not in choices:
        raise InvalidInput(f"'{name}' must be one of {', '.join(choices)}; got '{raw[:40]}'", field=name)
    return raw


def _body(optional: bool = False) -> dict[str, Any]:
    data = request.get_data(cache=False)
    if not data and optional:
        return {}
    if request.mimetype != "application/json":
        raise InvalidInput(f"Content-Type must be application/json; got {request.content_type or 'none'}",
                           field="Content-Type")
    body = parse_json(data)
    if not isinstance(body, dict):
        raise InvalidInput(f"body must be a JSON object; got {type(body).__name__}", field="body")
    return body


def _check_keys(body: dict[str, Any], allowed: tuple[str, ...]) -> None:
    for key in body:
        if key not in allowed:
            raise InvalidInput(f"'{str(key)[:40]}' is not a field here; expected {', '.join(allowed)}",
                               field=str(key)[:40])


_ITEM_ID = re.compile(r"[A-Za-z0-9_-]{1,64}")


def _item_id(value: Any, field: str) -> str:
    """An item id a client sent back (``skip``, ``after``): client text, then the id alphabet."""
    text = client_text(value, field, max_chars=64)
    if not _ITEM_ID.fullmatch(text):
        raise InvalidInput(f"'{field}' must be an item id (1-64 characters of A-Z a-z 0-9 _ -); "
                           f"got {len(text)} characters", field=field)
    return text


def _decision_fields(body: dict[str, Any], item: ReviewItem) -> tuple[str | None, float | None, str | None]:
    _check_keys(body, ("label", "value", "note"))
    label, value, note = body.get("label"), body.get("value"), body.get("note")
    if (label is None) == (value is None):
        raise InvalidInput("a decision needs exactly one of 'label' (classification) or 'value' (regression)",
                           field="label")
    task = item.summary.get("task")
    if label is not None:
        if task == "regression":
            raise InvalidInput("this item is a regression case: give 'value', not 'label'", field="label")
        client_text(label, "label", max_chars=MAX_LABEL_CHARS)
        labels = item.summary.get("labels")
        if labels and label not in labels:
            raise InvalidInput(f"'label' must be one of the model's labels ({', '.join(map(str, labels))}); "
                               f"got '{label[:40]}'", field="label")
    if value is not None:
        if task == "classification":
            raise InvalidInput("this item is a classification case: give 'label', not 'value'", field="value")
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(float(value)):
            shown = repr(value)[:40] if isinstance(value, (int, float)) else type(value).__name__
            raise InvalidInput(f"'value' must be a finite number; got {shown}", field="value")
        value = float(value)
    if note is not None:
        if note != "":  # an empty note is no note
            note = client_text(note, "note", max_chars=MAX_NOTE_CHARS, multiline=True)
        note = note.strip() or None
    return label, value, note


def make_blueprint(router: Any) -> Blueprint:
    """The reviewer blueprint bound to ``router`` (its ``store`` holds the queue)."""
    bp = Blueprint("demur_reviews", __name__)
    assets = {name: (STATIC_DIR / name).read_bytes() for name in _ASSETS}

    def store() -> Any:
        return router.store

    def me() -> Any:
        return g.demur_principal

    @bp.after_request
    def _page_headers(response: Response) -> Response:
        if response.status_code == 401 and "WWW-Authenticate" not in response.headers:
            response.headers["WWW-Authenticate"] = 'Bearer realm="demur"'  # RFC 6750, section 3
        if request.path == "/review" or request.path.startswith("/review/"):
            for key, value in PAGE_HEADERS.items():
                response.headers[key] = value
        return response

    @bp.get("/review")
    def page() -> Response:
        return Response(assets["review.html"], mimetype="text/html")

    @bp.get("/review/assets/<name>")
    def asset(name: str) -> Response:
        if name not in _ASSETS or name == "review.html":
            raise NotFound(f"no reviewer asset '{name[:40]}'", field="path")
        return Response(assets[name], mimetype=_ASSETS[name])

    @bp.get("/v1/reviews")
    @require("review")
    def list_items() -> Response:
        status = _choice_arg("status", STATUSES, None)
        kind = _choice_arg("kind", KINDS, None)
        limit = _int_arg("limit", 50, 1, MAX_LIMIT)
        after = request.args.get("after")
        if after is not None:
            _item_id(after, "after")
        items = store().page(status, kind=kind, limit=limit, after=after)
        nxt = items[-1].id if len(items) == limit else None
        return _json({"items": [it.brief() for it in items], "next": nxt})

    @bp.post("/v1/reviews/claim")
    @require("review")
    def claim() -> Response:
        body = _body(optional=True)
        _check_keys(body, ("skip",))
        skip = body.get("skip", [])
        if not isinstance(skip, list) or len(skip) > MAX_EXCLUDE:
            raise InvalidInput(f"'skip' must be a list of at most {MAX_EXCLUDE} item ids", field="skip")
        for i, sid in enumerate(skip):
            _item_id(sid, f"skip[{i}]")
        item = store().claim_next(me().id, exclude=skip)
        return _json({"item": item.to_json() if item else None, "reviewer": me().id,
                      "lease_s": store().lease_s, "counts": store().counts()})

    @bp.get("/v1/reviews/summary")
    @require("review")
    def summary() -> Response:
        return _json({"counts": store().counts(), "accuracy": router.accuracy(),
                      "audit_fraction": router.audit_fraction, "reviewer": me().id,
                      "admin": me().is_admin})

    @bp.get("/v1/reviews/export")
    @require("review")
    def export() -> Response:
        fmt = _choice_arg("format", ("jsonl", "csv"), "jsonl")
        limit = _int_arg("limit", MAX_EXPORT, 1, MAX_EXPORT)
        items = _decided(store(), limit)
        if fmt == "jsonl":
            text = "".join(orjson.dumps(it.to_json()).decode("utf-8") + "\n" for it in items)
            mimetype, name = "application/x-ndjson", "demur-decided.jsonl"
        else:
            text, mimetype, name = _csv(items), "text/csv", "demur-decided.csv"
        response = Response(text, mimetype=mimetype)
        response.headers["Content-Disposition"] = f'attachment; filename="{name}"'
        response.headers["Cache-Control"] = "no-store"
        return response

    @bp.get("/v1/reviews/<item_id:item_id>")
    @require("review")
    def get_item(item_id: str) -> Response:
        return _json({"item": store().get(item_id).to_json()})

    @bp.post("/v1/reviews/<item_id:item_id>/decision")
    @require("review")
    def decide(item_id: str) -> Response:
        item = store().get(item_id)
        label, value, note = _decision_fields(_body(), item)
        done = store().decide(item_id, me().id, label=label, value=value, note=note, admin=me().is_admin)
        return _json({"item": done.to_json(), "counts": store().counts()})

    @bp.post("/v1/reviews/<item_id:item_id>/release")
    @require("review")
    def release(item_id: str) -> Response:
        _check_keys(_body(optional=True), ())
        item = store().release(item_id, me().id, admin=me().is_admin)
        return _json({"item": item.brief(), "counts": store().counts()})

    return bp


def _decided(store: Any, limit: int) -> list[ReviewItem]:
    out: list[ReviewItem] = []
    after = None
    while len(out) < limit:
        page = store.page("decided", limit=min(MAX_LIMIT, limit - len(out)), after=after)
        out += page
        if len(page) < MAX_LIMIT:
            break
        after = page[-1].id
    return out


def _csv(items: list[ReviewItem]) -> str:
    """One row per decided item: who, when, the decision, the model's prediction, the chance it
    was sent to people (``inclusion``: recertification weights by it), the decision score it was
    served with (``score``), then the inputs.

    Input columns are the bundle's feature names when every item shares them,
    else ``x0, x1, ...`` (the widest item sets the count; shorter rows end early).
    """
    width = max((len(it.case.get("values", [])) for it in items), default=0)
    name_sets = {tuple(it.case.get("names") or ()) for it in items}
    shared = next(iter(name_sets)) if len(name_sets) == 1 else ()
    inputs = list(shared) if len(shared) == width else [f"x{i}" for i in range(width)]
    head = ["id", "kind", "model_name", "model_version", "model_checksum", "client_case_id", "created",
            "decided", "reviewer", "label", "value", "prediction", "note", "inclusion", "score"]
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(head + inputs)
    for it in items:
        d = it.to_json()
        text = [it.id, it.kind, it.model_name, it.model_version, it.model_checksum, it.client_case_id or "",
                d["created"], d["decision"]["decided"], it.decided_by or "",
                it.label if it.label is not None else "", "" if it.value is None else repr(it.value),
                it.prediction or "", it.note or "", _inclusion(it), _served_score(it)]
        writer.writerow([_safe_cell(str(cell)) for cell in text] + [repr(float(v)) for v in it.case.get("values", [])])
    return buf.getvalue()


def _served_score(item: ReviewItem) -> str:
    """The decision score the item was served with (its summary's ``score.value``; empty when
    absent). A fresh-draw graph (flip, sampler) scores a case anew on every call, so only this
    value says on which side of the threshold the case fell: recertification reads it."""
    score = item.summary.get("score") if isinstance(item.summary, dict) else None
    value = score.get("value") if isinstance(score, dict) else None
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return repr(float(value))
    return ""


def _inclusion(item: ReviewItem) -> str:
    """The chance the item was sent to people: 1 for an abstention, the audit fraction for an
    audit (recorded in its summary since this release; empty when an older item lacks it)."""
    value = item.summary.get("inclusion") if isinstance(item.summary, dict) else None
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return repr(float(value))
    return "1.0" if item.kind == "abstain" else ""


_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?|[+-]?(?:inf|nan)")
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def _safe_cell(text: str) -> str:
    """A text cell a spreadsheet will not run: one starting with = + - @ tab or CR gets a
    leading apostrophe (OWASP, "CSV Injection"). A plain number ("-0.25") is left as it is:
    spreadsheets read it as a number, never as a formula."""
    if text[:1] in _FORMULA_START and not _NUMBER.fullmatch(text):
        return "'" + text
    return text


class ItemIdConverter(BaseConverter):
    """``<item_id:item_id>``: an item id, never one of the fixed words under /v1/reviews/, so
    ``OPTIONS /v1/reviews/claim`` answers ``Allow: POST, OPTIONS`` (claim is no item id; the
    document lists no GET there) and routing alone cannot confuse the two."""

    regex = r"(?!(?:claim|summary|export)$)[A-Za-z0-9_-]{1,64}"


def install_review_api(app: Any, router: Any) -> None:
    """Register the reviewer blueprint (and its item-id converter) on ``app``."""
    app.url_map.converters["item_id"] = ItemIdConverter
    app.register_blueprint(make_blueprint(router))
