"""The binary predict body: the cases as one NumPy ``.npy`` array (``Content-Type: application/x-npy``).

Why: a 3x224x224 case is 150,528 numbers; as JSON that is about a megabyte of text per case
that the server must parse number by number. As ``.npy`` (NumPy's documented format: a
magic string, a version, a small header naming dtype, order and shape, then the raw values;
numpy.lib.format) it is 602 kB of float32 read without a per-number step.

Accepted: format version 1.0 or 2.0; dtype float32 or float64 (either byte order), or an
integer type (its values are exact in float64); C or Fortran order; shape ``[B, *inputs.shape]``
or ``[B, F]`` with F = prod(inputs.shape). The body holds the cases only: the array's rows are
the cases, in the order of ``inputs.names`` (no case ids: send JSON for those).

Refused with the same errors as a JSON body, naming the field: not an ``.npy`` file, an
unreadable header, a header whose shape needs more (or fewer) bytes than sent, object or
structured dtypes (``body``); a wrong shape, no cases, a dtype that is not numbers
(``cases``); more than ``max_cases`` cases (413, ``cases``); NaN, infinities or magnitudes
beyond float32 (``cases[i][j]``, the first such element). The header is parsed before
anything is allocated, so a header claiming 10**15 values costs nothing.

Example::

    buf = io.BytesIO(); np.save(buf, images.astype(np.float32))      # images: [B, 3, 224, 224]
    requests.post(url + "/v1/predict", data=buf.getvalue(), headers={"Content-Type": "application/x-npy"})
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass

import numpy as np
import numpy.lib.format as npy_format

from demur.serve.core.bundle import F32_LIMIT, InputSpec
from demur.serve.errors import InvalidInput, PayloadTooLarge

__all__ = ["NPY_MEDIA_TYPE", "ArrayBody", "parse_npy", "validate_array"]

NPY_MEDIA_TYPE = "application/x-npy"
"""The Content-Type of a binary predict body."""

_MAGIC = b"\x93NUMPY"


@dataclass(frozen=True)
class ArrayBody:
    """A parsed ``.npy`` predict body: ``cases`` as sent (read-only, not yet validated)."""

    cases: np.ndarray

    @property
    def rows(self) -> int:
        return int(self.cases.shape[0]) if self.cases.ndim else 1


def parse_npy(data: bytes) -> ArrayBody:
    """The array in ``data`` (an ``.npy`` file's bytes), without copying its values; ``InvalidInput``
    naming ``body`` when it is not a readable numeric ``.npy`` array."""
    if not data.startswith(_MAGIC):
        raise InvalidInput(f"body is not a NumPy .npy file: it must start with \\x93NUMPY; got {data[:6]!r} "
                           "(np.save writes one)", field="body")
    fp = io.BytesIO(data)
    try:
        version = npy_format.read_magic(fp)
        if version == (1, 0):
            shape, fortran, dtype = npy_format.read_array_header_1_0(fp)
        elif version == (2, 0):
            shape, fortran, dtype = npy_format.read_array_header_2_0(fp)
        else:
            raise ValueError(f"format version {version[0]}.{version[1]} (1.0 and 2.0 are accepted)")
    except Exception as exc:  # the header is the client's text: whatever numpy's reader raises
        # on it (ValueError, SyntaxError, EOFError, tokenize.TokenError for an unbalanced bracket, ...) is a 400
        raise InvalidInput(f"body is not a readable .npy array: {type(exc).__name__}: {str(exc)[:200]}",
                           field="body") from None
    if dtype.hasobject or dtype.fields is not None or dtype.subdtype is not None or dtype.itemsize == 0:
        raise InvalidInput(f"body's .npy array must hold plain numbers; got dtype {str(dtype)[:60]}", field="body")
    if any(d < 0 for d in shape):  # numpy's header reader lets them through; reshape would fail on them
        raise InvalidInput(f"body's .npy header declares shape {list(shape)[:8]}: dimensions must not be negative",
                           field="body")
    count = math.prod(shape)
    have = len(data) - fp.tell()
    if count * dtype.itemsize != have:
        raise InvalidInput(f"body's .npy header declares shape {list(shape)} of {dtype} ({count * dtype.itemsize} "
                           f"bytes of values); the body holds {have}", field="body")
    flat = np.frombuffer(data, dtype=dtype, count=count, offset=fp.tell())
    return ArrayBody(flat.reshape(shape, order="F" if fortran else "C"))


def validate_array(body: ArrayBody, spec: InputSpec, max_cases: int) -> np.ndarray:
    """The cases of ``body`` as float32[B, *inputs.shape] (raw units), or the error naming the field."""
    arr = body.cases
    shape = tuple(spec.shape)
    if arr.dtype.kind not in "fiu":
        raise InvalidInput(f"'cases' must be numbers (float16, float32, float64 or integers); got dtype {arr.dtype}",
                           field="cases")
    forms = {shape, (spec.size,)}
    if arr.ndim < 1 or tuple(arr.shape[1:]) not in forms:
        want = " or ".join(f"[B, {', '.join(map(str, f))}]" for f in sorted(forms, key=len, reverse=True))
        raise InvalidInput(f"'cases' must be an array of shape {want}; got {list(arr.shape)}", field="cases")
    if arr.shape[0] < 1:
        raise InvalidInput("'cases' must not be empty", field="cases")
    if arr.shape[0] > max_cases:
        raise PayloadTooLarge(f"'cases' holds {arr.shape[0]} cases; at most {max_cases} per request", field="cases")
    if arr.dtype.kind == "f":
        bad = ~np.isfinite(arr)
        if arr.dtype.itemsize > 4:
            bad |= np.abs(arr) >= F32_LIMIT
        if bad.any():
            at = np.unravel_index(int(np.argmax(bad)), arr.shape)
            value = float(arr[at])
            what = "a finite number" if not math.isfinite(value) else "within float32 range (about 3.4e38)"
            field = "cases" + "".join(f"[{int(i)}]" for i in at)
            raise InvalidInput(f"'{field}' must be {what}; got {value!r}", field=field)
    return np.asarray(arr, dtype=np.float32).reshape((arr.shape[0], *shape))
