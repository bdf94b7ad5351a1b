"""The binary predict body (serve/core/npy_body.py): cases as one NumPy .npy array.

Reference for the format: NumPy's own writer, ``np.save`` (numpy.lib.format, format versions 1.0
and 2.0). Behaviour: the same answers as the JSON body for the same numbers, and every refusal a
4xx naming the field, as for JSON.
"""

from __future__ import annotations

import io
import struct
from typing import Any

import numpy as np
import numpy.lib.format as npy_format
import pytest

NPY = "application/x-npy"


def _npy(arr: np.ndarray, **kw: Any) -> bytes:
    buf = io.BytesIO()
    np.save(buf, arr, **kw)
    return buf.getvalue()


def _post(client: Any, data: bytes, ctype: str = NPY) -> Any:
    return client.post("/v1/predict", data=data, content_type=ctype)


def _rows(n: int) -> np.ndarray:
    return np.random.default_rng(0).uniform(0, 16, size=(n, 64)).round(3)


def test_same_answers_as_json(client: Any) -> None:
    x = _rows(3)
    by_json = client.post("/v1/predict", json={"cases": x.tolist()}).get_json()
    for arr in (x.astype(np.float32), x, np.asfortranarray(x), x.reshape(3, 64).astype(">f8")):
        r = _post(client, _npy(arr))
        assert r.status_code == 200, r.get_json()
        body = r.get_json()
        assert [c["prediction"] for c in body["results"]] == [c["prediction"] for c in by_json["results"]]
        for got, want in zip(body["results"], by_json["results"]):
            assert np.allclose(got["probabilities"] if "probabilities" in got else got["mean"],
                               want["probabilities"] if "probabilities" in want else want["mean"], atol=1e-6)


def test_format_version_2_and_integers_and_image_shapes(image_client: Any) -> None:
    x = np.random.default_rng(1).integers(0, 17, size=(2, 1, 8, 8))
    buf = io.BytesIO()
    npy_format.write_array(buf, x, version=(2, 0))
    assert _post(image_client, buf.getvalue()).status_code == 200
    assert _post(image_client, _npy(x.reshape(2, 64).astype(np.float32))).status_code == 200  # [B, F] too


@pytest.mark.parametrize("data, field", [
    (b"", "body"),
    (b"{\"cases\": []}", "body"),                                              # JSON sent as .npy
    (_npy(np.zeros((2, 64), np.float32))[:-5], "body"),                       # truncated
    (_npy(np.zeros((2, 64), np.float32)) + b"\x00" * 4, "body"),              # trailing bytes
    (_npy(np.array([{"a": 1}], dtype=object), allow_pickle=True), "body"),    # pickled objects
    (_npy(np.zeros(2, dtype=[("a", "<f4"), ("b", "<f4")])), "body"),           # structured
    (_npy(np.zeros((2, 63), np.float32)), "cases"),
    (_npy(np.zeros((0, 64), np.float32)), "cases"),
    (_npy(np.zeros((2, 64), bool)), "cases"),
    (_npy(np.array(["a"] * 64).reshape(1, 64)), "cases"),
])
def test_refusals_name_the_field(client: Any, data: bytes, field: str) -> None:
    r = _post(client, data)
    assert r.status_code == 400, r.get_data()
    err = r.get_json()["error"]
    assert err["field"] == field and err["message"]


def test_non_finite_and_out_of_range_elements_are_named(client: Any, image_client: Any) -> None:
    x = _rows(3)
    x[1, 5] = np.nan
    r = _post(client, _npy(x.astype(np.float32)))
    assert r.status_code == 400 and r.get_json()["error"]["field"] == "cases[1][5]"
    x[1, 5], x[2, 0] = 1.0, 1e39                         # beyond float32 (about 3.4e38)
    r = _post(client, _npy(x))
    assert r.status_code == 400 and r.get_json()["error"]["field"] == "cases[2][0]"
    img = np.ones((2, 1, 8, 8), np.float32)
    img[0, 0, 3, 4] = np.inf
    r = _post(image_client, _npy(img))
    assert r.status_code == 400 and r.get_json()["error"]["field"] == "cases[0][0][3][4]"


def test_too_many_cases_is_413_naming_cases(tiny_bundle_factory: Any, make_app: Any) -> None:
    client = make_app(tiny_bundle_factory(task="classification", kind="stacked", draws=8), max_cases=4).test_client()
    r = _post(client, _npy(np.ones((5, 64), np.float32)))
    assert r.status_code == 413 and r.get_json()["error"]["field"] == "cases"


def test_hostile_header_allocates_nothing(client: Any) -> None:
    """A header claiming 10**15 float64 values and a few bytes of data: refused on the byte count."""
    header = "{'descr': '<f8', 'fortran_order': False, 'shape': (1000000000000000, 64), }"
    header += " " * (63 - len(header) % 64) + "\n"
    data = b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header.encode() + b"\x00" * 64
    r = _post(client, data)
    assert r.status_code == 400 and r.get_json()["error"]["field"] == "body"
    assert "declares shape" in r.get_json()["error"]["message"]


def test_other_media_types_are_still_415(client: Any) -> None:
    r = _post(client, _npy(_rows(1)), ctype="application/octet-stream")
    assert r.status_code == 415 and r.get_json()["error"]["field"] == "Content-Type"
    assert NPY in r.get_json()["error"]["message"]


def _hand_header(header: str) -> bytes:
    """A version 1.0 .npy preamble around ``header`` (layout: numpy.lib.format's documentation)."""
    header += " " * (63 - (len(header) + 10) % 64) + "\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header.encode()


@pytest.mark.parametrize("header, values", [
    # numpy.lib.format.read_array_header_1_0 accepts negative ints in 'shape' (NumPy 2.x, checked
    # by hand); the byte count of (-1, -64) matches 64 float32 values, so only the sign can refuse it
    ("{'descr': '<f4', 'fortran_order': False, 'shape': (-1, -64), }", b"\x00" * 256),
    ("{'descr': '<f4', 'fortran_order': False, 'shape': (-2, -32), }", b"\x00" * 256),
    # a zero-byte void dtype: numpy reads the header; np.frombuffer then refuses it
    ("{'descr': '|V0', 'fortran_order': False, 'shape': (1, 64), }", b""),
    # an unbalanced bracket: numpy's header filter raises tokenize.TokenError, not a ValueError
    ("{'descr': '<f4', 'fortran_order': False, 'shape': (999999, }", b"\x00" * 256),
    ("{'descr': '<f4', 'fortran_order': False, 'shape': [[[[(1, 64)", b"\x00" * 256),
])
def test_headers_numpy_reads_but_cannot_hold_cases_are_400_naming_body(client: Any, header: str,
                                                                      values: bytes) -> None:
    """Found by a new-user trial: all were 500 (reshape / frombuffer raised ValueError; numpy's header
    filter raised tokenize.TokenError)."""
    r = _post(client, _hand_header(header) + values)
    assert r.status_code == 400, r.get_data()
    assert r.get_json()["error"]["field"] == "body"
