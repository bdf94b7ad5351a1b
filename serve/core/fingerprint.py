"""A fingerprint of the rows a model was trained on: hashes, never the data.

Why: a threshold calibrated on rows the model has already fitted certifies an
accuracy the model will not have on new cases (its training rows are the ones
it gets right). The bundle therefore records, at export, one short hash per
training row, and ``demur calibrate`` counts how many calibration rows match.

What is hashed: each raw input row (before standardisation), flattened in C
order, cast to float32 (the graphs' input dtype) with -0.0 folded into 0.0,
little-endian bytes; the first 8 bytes of its SHA-256 (FIPS 180-4) read as an
unsigned 64-bit integer. The record keeps the sorted unique hashes, base64 of
their little-endian bytes, so it reveals no feature value. Two different rows
collide with probability about 2**-64 per pair (for 10**6 training rows and
10**5 calibration rows, about 5e-9 in all). A match means "the same float32
values": a file that rounds its numbers differently from the training arrays
is not recognised, so the check finds copies, not near-copies.

Natural duplicates versus leaks. With discrete features different people share
a feature vector, so a held-out file drawn apart from the training rows still
matches some of them. How many is predicted by the training rows' own
repetition: the share of training rows whose vector occurs again among the
OTHER training rows, 1 - N1/N (N1 vectors seen exactly once among N rows), is
the leave-one-out estimate of the probability that a fresh row from the same
population matches a training row -- Good's (1953) estimate of the mass of
already-seen values (Good, "The population frequencies of species", Biometrika
40). Its own uncertainty counts too: the rate used is the one-sided 95%
Clopper-Pearson upper bound of N - N1 repeats out of N (scipy.stats.beta.ppf;
75 training rows without a repeat still allow 3.9%: the iris measurements,
rounded to 0.1 cm, share vectors although no two of 75 training rows do).
The record keeps N and N1 (counts only). ``training_overlap`` compares the
observed matches c among m checkable rows with Binomial(m, that rate): the
one-sided p-value P(X >= c) (scipy.stats.binom.sf) below ``LEAK_LEVEL`` means
clearly more matches than natural duplication explains ("leak": calibrate
refuses); otherwise the matches are natural duplicates ("natural": kept, with
a warning giving the counts). For continuous features N1 = N, so a handful of
copies is only warned about (400 training rows: 1 copy among 175 rows gives
P = 0.7, 5 copies 0.01) while a file of training rows is refused. What it
cannot tell: when nearly every vector is common (5 binary features: 1 - N1/N
near 1) a copy of the training rows looks like fresh rows; a model can then not
have memorised more than its cells' labels, so the flattery is small. A record written before N1 was kept treats every
match as a leak.

Size: 8 bytes per training row (about 11 bytes in the JSON). Above
``MAX_ROWS`` rows only the hashes below ``2**64 * MAX_ROWS / rows`` are kept (a
deterministic hash-range subsample); a calibration row can then only be checked
if its own hash falls in that range, and ``training_overlap`` scales the count.

Pure numpy + hashlib (``serve/core`` imports no framework). The exporter calls
``training_fingerprint(x_train)`` once and stores the result under the
manifest's ``extensions.training_rows``; ``demur calibrate`` reads it back.

Example::

    record = training_fingerprint(x_train)                  # JSON-ready dict
    seen = seen_in_training(record, x_holdout)              # bool[N]
"""

from __future__ import annotations

import base64
import hashlib
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

__all__ = [
    "FINGERPRINT_METHOD",
    "LEAK_LEVEL",
    "MAX_ROWS",
    "Overlap",
    "row_hashes",
    "seen_in_training",
    "training_fingerprint",
    "training_overlap",
]

FINGERPRINT_METHOD = "sha256-64 of float32 row bytes, sorted"
"""Names the hashing rule, so a later rule can be told apart from this one."""

LEAK_LEVEL = 1e-3
"""A file's matches are a leak when P(Binomial(m, repeat rate) >= matches) is below this (our choice:
on binned load_breast_cancer splits natural duplicates scored 0.15-0.93; 200 training rows < 0.01)."""

MAX_ROWS = 1_000_000
"""Most hashes kept in a manifest (8 MB of hashes; about 11 MB of JSON)."""

_FULL_RANGE = 2**64


def row_hashes(x: np.ndarray) -> np.ndarray:
    """One 64-bit hash per row of ``x`` (float[N, ...]; each row flattened in C order): uint64[N]."""
    a = np.asarray(x, dtype=np.float64)
    rows = np.ascontiguousarray(a.reshape(len(a), -1).astype("<f4") + np.float32(0.0))  # -0.0 -> 0.0
    out = np.empty(len(rows), dtype=np.uint64)
    for i, row in enumerate(rows):
        out[i] = int.from_bytes(hashlib.sha256(row.tobytes()).digest()[:8], "little")
    return out


def training_fingerprint(x_train: np.ndarray) -> dict[str, Any]:
    """The manifest record for training inputs ``x_train`` (raw, float[N, ...]).

    Keys: ``method``, ``rows`` (training rows hashed), ``kept_below`` (hashes
    >= this were dropped; 2**64 means none), ``singletons`` (N1: vectors seen
    exactly once), ``hashes`` (base64 of the sorted unique uint64 hashes,
    little-endian).
    """
    h, counts = np.unique(row_hashes(x_train), return_counts=True)
    n = int(len(np.asarray(x_train)))
    cut = _FULL_RANGE
    if len(h) > MAX_ROWS:
        cut = int(h[MAX_ROWS])  # keep exactly the MAX_ROWS smallest hashes
        h = h[:MAX_ROWS]
    return {
        "method": FINGERPRINT_METHOD,
        "rows": n,
        "kept_below": str(cut),
        "singletons": int(np.sum(counts == 1)),
        "hashes": base64.b64encode(h.astype("<u8").tobytes()).decode("ascii"),
    }


@dataclass(frozen=True)
class Overlap:
    """How many rows of a file were in the training data.

    ``seen``: bool[N], rows whose hash is recorded; ``checkable``: rows whose
    hash falls in the recorded range (all rows unless the training set was
    subsampled); ``estimated``: seen rows scaled to all rows (= ``seen.sum()``
    when nothing was subsampled); ``repeat_rate``: the chance a fresh row matches a
    training row, the upper 95% bound of 1 - N1/N (0 when the record predates N1); ``expected``: the
    checkable rows times it; ``p_value``: P(Binomial(checkable, repeat_rate) >= count).
    """

    seen: np.ndarray
    checkable: int
    estimated: float
    repeat_rate: float = 0.0
    expected: float = 0.0
    p_value: float = 1.0

    @property
    def count(self) -> int:
        return int(self.seen.sum())

    @property
    def verdict(self) -> str:
        """"none" (no match), "natural" (no more matches than the training rows' own repetition
        explains) or "leak" (clearly more: p_value < ``LEAK_LEVEL``)."""
        if not self.count:
            return "none"
        return "leak" if self.p_value < LEAK_LEVEL else "natural"

    def describe(self) -> str:
        """The counts in one sentence, for warnings and refusals."""
        return (f"{self.count} of {self.checkable} rows match a training row; natural duplication predicts about "
                f"{self.expected:.1f} ({self.repeat_rate:.1%} of fresh rows, from the training rows' own repetition, "
                f"Good 1953); P(at least {self.count}) = {self.p_value:.2g}")


def training_overlap(record: dict[str, Any], x: np.ndarray) -> Overlap:
    """Compare rows ``x`` (raw, float[N, ...]) with a ``training_fingerprint`` record.

    Raises ``ValueError`` for a record of another method or a damaged one.
    """
    if not isinstance(record, dict) or record.get("method") != FINGERPRINT_METHOD:
        got = record.get("method") if isinstance(record, dict) else type(record).__name__
        raise ValueError(f"training-row fingerprint must use method {FINGERPRINT_METHOD!r}; got {got!r}")
    try:
        recorded = np.frombuffer(base64.b64decode(record["hashes"], validate=True), dtype="<u8")
        cut = int(record.get("kept_below", _FULL_RANGE))
    except (KeyError, TypeError, ValueError) as exc:
        raise ValueError(f"training-row fingerprint is damaged: {exc}") from exc
    h = row_hashes(x)
    pos = np.clip(np.searchsorted(recorded, h), 0, max(len(recorded) - 1, 0))
    seen = (recorded[pos] == h) if len(recorded) else np.zeros(len(h), dtype=bool)
    in_range = h < np.uint64(min(cut, _FULL_RANGE - 1)) if cut < _FULL_RANGE else np.ones(len(h), dtype=bool)
    checkable = int(in_range.sum())
    seen = seen & in_range
    estimated = float(seen.sum()) * (len(h) / checkable) if checkable else 0.0
    rows, single = int(record.get("rows", 0) or 0), record.get("singletons")
    rate = 0.0
    if isinstance(single, int) and rows > 0:  # upper 95% bound on the repeat rate (N - N1) / N
        repeats = rows - int(single)
        rate = 1.0 if repeats >= rows else float(stats.beta.ppf(0.95, repeats + 1, rows - repeats))
    count = int(seen.sum())
    p_value = float(stats.binom.sf(count - 1, checkable, rate)) if count else 1.0
    return Overlap(seen=seen, checkable=checkable, estimated=estimated, repeat_rate=rate,
                   expected=checkable * rate, p_value=p_value)


def seen_in_training(record: dict[str, Any], x: np.ndarray) -> np.ndarray:
    """bool[N]: which rows of ``x`` are recorded as training rows (see ``training_overlap``)."""
    return training_overlap(record, x).seen
