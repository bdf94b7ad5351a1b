"""Hostile input against a real ``demur serve`` on 127.0.0.1: at least 1,000
property-generated payloads (10,000 in the long variant), every one invalid by
construction -- deep nesting, huge numbers, wrong types, unicode, oversized
bodies, too many cases, wrong content types, broken JSON, NaN/Infinity,
wrong methods and routes. Each must get a 4xx JSON error naming a field;
zero 5xx; the server healthy afterwards and no traceback in its log.

References: RFC 8259 (JSON: NaN/Infinity are not JSON; what nesting means),
RFC 9110 section 15.5 (4xx client errors: 400, 404, 405, 413, 415), IEEE 754
binary32 (largest finite float32 3.4028235e38, numpy.finfo(np.float32).max).
Payloads come from hypothesis strategies; hypothesis only generates them here
and the collected list is sent by concurrent clients, so the suite stays short.
"""

from __future__ import annotations

import http.client
import json
import threading
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import requests
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from .harness import Server, record

MAX_BODY = 64 * 1024
MAX_CASES = 64
F32_MAX = float(np.finfo(np.float32).max)
NAMES = [f"px_r{r}c{c}" for r in range(8) for c in range(8)]
CONTENT_TYPES = ["text/plain", "application/x-www-form-urlencoded", "multipart/form-data; boundary=zz",
                 "application/xml", "text/json", "application/jsonp", "application/octet-stream", "", "*/*",
                 "application/json-patch+json", "image/png"]

Payload = tuple[str, str, str, bytes, str]  # category, method, path, body, content type

_pixels = st.lists(st.integers(0, 16), min_size=64, max_size=64)


def _valid_case() -> st.SearchStrategy[list[Any]]:
    return _pixels


def _dump(obj: Any) -> bytes:
    return json.dumps(obj, ensure_ascii=False).encode("utf-8", "surrogatepass")


@st.composite
def deep_nesting(draw: st.DrawFn) -> Payload:
    depth = draw(st.integers(2, 5000))
    inner = draw(st.sampled_from([b"", b"1", b"{}", b'"x"', b"null"]))
    where = draw(st.sampled_from(["cases", "case_ids", "objects"]))
    if where == "objects":
        body = b'{"cases":[' + b'{"px_r0c0":' * depth + b"1" + b"}" * depth + b"]}"
    elif where == "cases":
        body = b'{"cases":' + b"[" * depth + inner + b"]" * depth + b"}"
    else:
        ones = b",".join([b"1"] * 64)
        body = b'{"cases":[[' + ones + b']],"case_ids":' + b"[" * depth + inner + b"]" * depth + b"}"
    return ("deep nesting", "POST", "/v1/predict", body, "application/json")


@st.composite
def huge_numbers(draw: st.DrawFn) -> Payload:
    case = [str(v).encode() for v in draw(_valid_case())]
    i = draw(st.integers(0, 63))
    literal = draw(st.one_of(
        st.integers(40, 5000).map(lambda k: b"9" * k),                       # > 1e39 > float32 max
        st.integers(40, 5000).map(lambda k: b"-" + b"7" * k),
        st.integers(39, 100000).map(lambda e: f"1e{e}".encode()),            # 1e39.. beyond float32
        st.floats(min_value=F32_MAX * 1.0001, max_value=1e308).map(lambda f: repr(f).encode()),
        st.sampled_from([b"NaN", b"Infinity", b"-Infinity", b"1e999999999", b"-1e400", b"0x10", b"1_000",
                         b"+1", b".5", b"01", b"1.", b"--1"]),
    ))
    case[i] = literal
    body = b'{"cases":[[' + b",".join(case) + b"]]}"
    return ("huge numbers / bad literals", "POST", "/v1/predict", body, "application/json")


_junk = st.one_of(st.text(max_size=20), st.booleans(), st.none(), st.dictionaries(st.text(max_size=5), st.integers(),
                                                                                  max_size=3),
                  st.lists(st.integers(), max_size=3))


@st.composite
def wrong_types(draw: st.DrawFn) -> Payload:
    kind = draw(st.integers(0, 5))
    if kind == 0:  # one element of an otherwise good case has the wrong type
        case: list[Any] = draw(_valid_case())
        case[draw(st.integers(0, 63))] = draw(_junk)
        body: Any = {"cases": [case]}
    elif kind == 1:  # cases itself is not a list of cases
        body = {"cases": draw(st.one_of(st.text(), st.integers(), st.floats(allow_nan=False), st.booleans(),
                                        st.none(), st.dictionaries(st.text(max_size=5), st.integers(), max_size=3),
                                        st.just([])))}
    elif kind == 2:  # the body is not an object
        body = draw(st.one_of(st.lists(st.integers(), max_size=5), st.text(max_size=20), st.integers(),
                              st.none(), st.booleans()))
    elif kind == 3:  # case_ids of the wrong type or length
        n = draw(st.integers(1, 3))
        ids = draw(st.one_of(st.lists(st.one_of(st.integers(), st.booleans(), st.lists(st.text(), max_size=2),
                                                st.dictionaries(st.text(max_size=3), st.text(max_size=3),
                                                                min_size=1, max_size=2)),
                                      min_size=n, max_size=n),
                             st.lists(st.text(max_size=10), min_size=n + 1, max_size=n + 3),
                             st.text(max_size=10), st.integers()))
        body = {"cases": [draw(_valid_case()) for _ in range(n)], "case_ids": ids}
    elif kind == 4:  # unknown top-level key
        key = draw(st.text(min_size=1, max_size=12).filter(lambda k: k not in ("cases", "case_ids")))
        body = {"cases": [draw(_valid_case())], key: draw(_junk)}
    else:  # wrong number of features
        n = draw(st.integers(0, 200).filter(lambda k: k != 64))
        body = {"cases": [draw(st.lists(st.integers(0, 16), min_size=n, max_size=n))]}
    return ("wrong types / shapes", "POST", "/v1/predict", _dump(body), "application/json")


@st.composite
def unicode_payloads(draw: st.DrawFn) -> Payload:
    kind = draw(st.integers(0, 3))
    if kind == 0:  # objects keyed by feature names with a unicode stranger among them
        names = dict.fromkeys(NAMES, 1)
        stranger = draw(st.text(min_size=1, max_size=30).filter(lambda s: s not in names))
        if draw(st.booleans()):
            del names[draw(st.sampled_from(NAMES))]
        names[stranger] = 1
        body = _dump({"cases": [names]})
    elif kind == 1:  # unicode strings where numbers belong
        case: list[Any] = draw(_valid_case())
        case[draw(st.integers(0, 63))] = draw(st.text(min_size=1, max_size=30))
        body = _dump({"cases": [case], "case_ids": [draw(st.text(max_size=30))]})
    elif kind == 2:  # invalid UTF-8 / lone surrogates inside the JSON
        junk = draw(st.sampled_from([b"\xff", b"\xc3\x28", b"\xed\xa0\x80", b"\xf4\x90\x80\x80", b"\x80"]))
        body = b'{"cases":[["' + junk + b'"]]}'
    else:  # an escaped lone surrogate as a case id, plus a short case
        body = b'{"cases":[[1,2,3]],"case_ids":["\\ud800' + draw(st.text(max_size=5)).encode() + b'"]}'
    return ("unicode", "POST", "/v1/predict", body, "application/json")


@st.composite
def oversized(draw: st.DrawFn) -> Payload:
    kind = draw(st.integers(0, 2))
    if kind == 0:  # a body over the byte limit
        size = draw(st.integers(MAX_BODY + 1, 4 * MAX_BODY))
        body = b'{"cases":[' + b" " * size + b"]}"
        return ("oversized body", "POST", "/v1/predict", body, "application/json")
    if kind == 1:  # a case id longer than allowed
        body = _dump({"cases": [list(range(64))], "case_ids": ["x" * draw(st.integers(201, 5000))]})
        return ("oversized field", "POST", "/v1/predict", body, "application/json")
    n = draw(st.integers(MAX_CASES + 1, 3 * MAX_CASES))  # too many cases (under the byte limit)
    body = b'{"cases":[' + b",".join([b"[" + b",".join([b"1"] * 64) + b"]"] * n) + b"]}"
    return ("too many cases", "POST", "/v1/predict", body, "application/json")


@st.composite
def wrong_content_type(draw: st.DrawFn) -> Payload:
    body = _dump({"cases": [draw(_valid_case())]})
    return ("wrong content type", "POST", "/v1/predict", body, draw(st.sampled_from(CONTENT_TYPES)))


@st.composite
def broken_json(draw: st.DrawFn) -> Payload:
    good = _dump({"cases": [draw(_valid_case())]})
    kind = draw(st.integers(0, 2))
    if kind == 0:
        body = good[: draw(st.integers(0, len(good) - 1))]  # truncated (never the whole document)
    elif kind == 1:
        body = b"\x00" + draw(st.binary(max_size=200))      # a NUL first: never JSON
    else:
        body = draw(st.sampled_from([b"{'cases': [[1]]}", b'{"cases": [[1,]]}', b"{cases: []}", b"[}", b"{]",
                                     b'{"cases":[[1]]} trailing', b"\xef\xbb\xbf{\"cases\":1}"]))
    return ("broken JSON", "POST", "/v1/predict", body, "application/json")


@st.composite
def wrong_route(draw: st.DrawFn) -> Payload:
    method, path = draw(st.sampled_from([("GET", "/v1/predict"), ("PUT", "/v1/predict"), ("DELETE", "/v1/model"),
                                         ("POST", "/healthz"), ("PATCH", "/readyz")]))
    if draw(st.booleans()):
        method = "POST"
        path = "/v1/" + draw(st.text(alphabet="abcdefghijklmnopqrstuvwxyz-_", min_size=1, max_size=20)
                             .filter(lambda p: p not in ("predict", "model", "reviews", "admin")))
    return ("wrong method / route", method, path, b"{}", "application/json")


HOSTILE = st.one_of(deep_nesting(), huge_numbers(), wrong_types(), unicode_payloads(), oversized(),
                    wrong_content_type(), broken_json(), wrong_route())


def _generate(n: int) -> list[Payload]:
    out: list[Payload] = []

    @settings(max_examples=n, deadline=None, database=None, phases=[Phase.generate],
              suppress_health_check=list(HealthCheck))
    @given(HOSTILE)
    def collect(payload: Payload) -> None:
        out.append(payload)

    collect()
    return out


def _send(port: int, payloads: list[Payload], clients: int = 16) -> list[tuple[Payload, int | None, Any]]:
    results: list[tuple[Payload, int | None, Any]] = []
    lock = threading.Lock()
    it = iter(payloads)

    def client() -> None:
        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
        try:
            while True:
                with lock:
                    p = next(it, None)
                if p is None:
                    return
                _, method, path, body, ctype = p
                headers = {"Content-Type": ctype} if ctype else {}
                status, parsed = None, None
                for _attempt in range(2):  # a connection the server closed after an error answer: reconnect
                    try:
                        conn.request(method, path, body=body, headers=headers)
                        resp = conn.getresponse()
                        raw = resp.read()
                        status = resp.status
                        try:
                            parsed = json.loads(raw)
                        except ValueError:
                            parsed = raw[:200]
                        if resp.will_close:
                            conn.close()
                        break
                    except (OSError, http.client.HTTPException) as exc:
                        conn.close()
                        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
                        parsed = f"{type(exc).__name__}: {exc}"
                with lock:
                    results.append((p, status, parsed))
        finally:
            conn.close()

    with ThreadPoolExecutor(max_workers=clients) as pool:
        for f in [pool.submit(client) for _ in range(clients)]:
            f.result(timeout=600)
    return results


def _hostile(tmp_path: Path, n: int, name: str, tiny_bundle_factory: Any) -> None:
    payloads = _generate(n)
    assert len(payloads) >= n * 0.95, f"hypothesis generated only {len(payloads)} payloads"
    env = {"DEMUR_DATA_DIR": str(tmp_path / "data"), "DEMUR_MAX_BODY_BYTES": str(MAX_BODY),
           "DEMUR_MAX_CASES": str(MAX_CASES)}
    with Server(Path(tiny_bundle_factory().path), tmp_path / "server.log", env=env) as server:
        results = _send(server.port, payloads)
        health = requests.get(server.url + "/healthz", timeout=5).status_code
        ready = requests.get(server.url + "/readyz", timeout=5).status_code
        good = requests.post(server.url + "/v1/predict", json={"cases": [list(range(64))]}, timeout=10).status_code
        log = server.log()
    by_status: dict[int | None, int] = {}
    for _, status, _ in results:
        by_status[status] = by_status.get(status, 0) + 1
    categories = sorted({p[0] for p, _, _ in results})
    bad = [(p[0], p[1], p[2], p[3][:80], s, b) for p, s, b in results
           if s is None or not 400 <= s < 500 or not isinstance(b, dict) or "error" not in b
           or not isinstance(b["error"].get("field"), str) or not b["error"]["field"]]
    record(name, requests=len(results), errors=len(bad), faults=0,
           note=f"statuses {dict(sorted((k or 0, v) for k, v in by_status.items()))}")
    assert len(results) == len(payloads)
    assert not bad, bad[:5]
    assert not any(s is not None and s >= 500 for _, s, _ in results)
    assert len(categories) == 10, categories
    assert (health, ready, good) == (200, 200, 200)
    assert "Traceback" not in log


def test_hostile_payloads(tmp_path: Path, tiny_bundle_factory: Any) -> None:
    _hostile(tmp_path, 1_000, "hostile payloads", tiny_bundle_factory)


@pytest.mark.long
def test_hostile_payloads_long(tmp_path: Path, tiny_bundle_factory: Any) -> None:
    _hostile(tmp_path, 10_000, "hostile payloads (long)", tiny_bundle_factory)
