"""The count-based abstention window: the share of the last W decisions that abstained.

``demur_abstain_ratio`` is read from it at scrape time (serve/adapters/metrics.py), so an
operator sees at once when the model starts sending more cases to people than calibration
expected, while ``rate(demur_cases_total[...])`` gives the time-based view. Count-based
rather than time-based so a quiet hour and a busy minute weigh the same number of cases.

Pure numpy, no lock of its own: the caller serialises ``push`` (metrics holds its lock).

Example::

    window = AbstainWindow(1000)
    window.push(np.array([True, False, False]))
    window.cases, window.abstentions, window.ratio     # 3, 1, 0.333...
"""

from __future__ import annotations

import numpy as np

__all__ = ["AbstainWindow"]


class AbstainWindow:
    """The last ``size`` decisions (a ring of bools) and how many of them abstained."""

    def __init__(self, size: int) -> None:
        if size < 1:
            raise ValueError(f"the abstention window needs at least 1 case; got {size}")
        self._ring = np.zeros(int(size), dtype=bool)
        self._next = 0
        self.cases = 0
        """Decisions in the window (at most ``size``)."""
        self.abstentions = 0
        """Abstentions among them."""

    @property
    def size(self) -> int:
        return int(self._ring.size)

    @property
    def ratio(self) -> float:
        """Abstentions / decisions in the window (0 before any decision)."""
        return self.abstentions / self.cases if self.cases else 0.0

    def push(self, abstain: np.ndarray) -> None:
        """Add one batch's decisions ``abstain`` bool[B], evicting the oldest beyond ``size``."""
        ring, w = self._ring, self._ring.size
        if abstain.size == 1:  # the common one-case request, without index arrays
            i, new = self._next, bool(abstain[0])
            if i < self.cases:  # slots below `cases` hold data; this one is evicted
                self.abstentions -= int(ring[i])
            ring[i] = new
            self.abstentions += int(new)
            self._next = (i + 1) % w
            self.cases = min(self.cases + 1, w)
            return
        if abstain.size > w:
            abstain = abstain[-w:]
        pos = (self._next + np.arange(abstain.size)) % w
        occupied = pos[pos < self.cases] if self.cases < w else pos
        self.abstentions -= int(ring[occupied].sum())
        ring[pos] = abstain
        self.abstentions += int(abstain.sum())
        self._next = int((self._next + abstain.size) % w)
        self.cases = min(self.cases + abstain.size, w)
