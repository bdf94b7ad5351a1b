"""demur's torch side: variational layers, training, and the bundle exporter.

May import ``serve``'s bundle schema; ``serve`` never imports this package.

Public calls:
    demur.export.calibrate(bundle, X, y, *, target_accuracy=..., confidence=..., max_abstain=...)
        choose the abstention threshold on your own labelled held-out arrays (export/holdout.py)
"""

from demur.export.holdout import calibrate

__all__ = ["calibrate"]
