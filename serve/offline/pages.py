"""The one page writer of the offline reports: Jinja2 templates (serve/offline/templates/,
shipped as package data) rendered with autoescaping, and what both reports share around
them: the caution every page carries, the figure format, JSON without NaN, pyplot off-screen.

``demur calibrate --report`` (serve/offline/report.py) and ``demur evaluate``
(serve/offline/evaluation.py) build a context of rows and sentences; the templates only lay
it out (``base.html``: the page and its caution; ``tables.html``: the one table writer).
Jinja2 comes with Flask, so the runtime's dependencies already hold it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["CAUTION", "figure", "json_safe", "pyplot", "render_page"]

CAUTION = (
    "demur supports, and never replaces, qualified human judgement. Accepted predictions can still "
    "be wrong; the guarantee is a statement about the population the calibration cases came from, "
    "not about any single case or batch, and it does not hold for inputs unlike that data."
)
"""The caution every page carries (``base.html``)."""


def figure(v: Any) -> str:
    """A cell as the pages show it: numbers to 4 significant digits, None or a non-finite number
    as "-", booleans as yes/no, anything else as text (escaped by the template)."""
    if isinstance(v, bool) or v is None:
        return "-" if v is None else ("yes" if v else "no")
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return "-" if not math.isfinite(float(v)) else f"{float(v):.4g}"
    return str(v)


_ENV: Any = None


def render_page(template: str, **context: Any) -> str:
    """``template`` (a file of serve/offline/templates/) rendered with ``context``; every value
    is HTML-escaped unless the template says otherwise."""
    global _ENV
    if _ENV is None:  # built on first use: the server never renders a page
        from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape

        _ENV = Environment(loader=PackageLoader("demur.serve.offline", "templates"),
                           autoescape=select_autoescape(default=True, default_for_string=True),
                           undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True)
        _ENV.filters["figure"] = figure
    return str(_ENV.get_template(template).render(caution=CAUTION, **context))


def json_safe(obj: Any) -> Any:
    """``obj`` with NumPy values as plain ones and non-finite floats as None (strict JSON)."""
    if isinstance(obj, Mapping):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return json_safe(obj.tolist())
    if isinstance(obj, np.generic):
        return json_safe(obj.item())
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def pyplot() -> Any:
    """matplotlib's pyplot on the off-screen Agg backend (the offline extra; never imported to serve)."""
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt
