"""serve/core/abstention.py: the count-based abstention window, against a plain reference:
``collections.deque(maxlen=W)`` of the same decisions (Python docs: a bounded deque drops
items from the opposite end once full)."""

from __future__ import annotations

from collections import deque

import numpy as np
import pytest

from demur.serve.core.abstention import AbstainWindow


@pytest.mark.parametrize("size", [1, 7, 50])
def test_window_matches_a_bounded_deque(size: int) -> None:
    rng = np.random.default_rng(size)
    window, ref = AbstainWindow(size), deque(maxlen=size)
    assert window.ratio == 0.0 and window.cases == 0
    for _ in range(200):
        batch = rng.random(int(rng.choice([1, 1, 3, size + 5]))) < 0.3  # one case, a few, more than the window
        window.push(batch)
        ref.extend(batch.tolist())
        assert (window.cases, window.abstentions) == (len(ref), sum(ref))
        assert window.ratio == pytest.approx(sum(ref) / len(ref))


def test_an_empty_window_is_refused() -> None:
    with pytest.raises(ValueError, match="at least 1 case"):
        AbstainWindow(0)
