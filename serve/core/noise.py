"""The noise a graph is fed or draws itself: its laws and its seeds (part of the bundle format).

Fresh graph kinds (sampler, flip) take float32 inputs besides ``x`` that the engine fills afresh
on every call (serve/adapters/engine.py, "Noise fed by the engine"); an input's name says its law.
Older sampler graphs hold random nodes instead, seeded by the rule below, which the engine
reapplies at load.
"""

from __future__ import annotations

__all__ = ["NOISE_LAWS", "SEED_MODULUS", "SEED_STRIDE", "node_seed", "noise_dof", "noise_law"]

NOISE_LAWS = ("signs", "normals", "uniforms", "chisquare")
"""Laws of the noise inputs a graph may take besides ``x``, filled afresh by the engine on
every call: ``signs`` uniform +-1, ``normals`` N(0, 1), ``uniforms`` uniform on (0, 1],
``chisquare`` chi-square with the degrees of freedom the name ends with (``chisquare.L0.dof4080``,
``noise_dof``; export/local.py's radial layers). An input's law is its name before the first dot
(``noise_law``)."""

SEED_MODULUS = 1 << 24
"""Seeds of random nodes stay below 2**24, where float32 (RandomNormal's ``seed`` attribute) is exact."""

SEED_STRIDE = 7919
"""Node ``i`` of a graph seeded with ``base`` gets ``(base + SEED_STRIDE * i) mod SEED_MODULUS``
(``node_seed``): distinct nodes keep distinct streams. The exporter wrote sampler graphs by
this rule; the engine reseeds them by it at load."""


def noise_law(name: str) -> str:
    """The law of a graph's noise input ``name``: the part before the first dot (``signs.flip.L0`` -> signs)."""
    return name.split(".")[0]


def noise_dof(name: str) -> int | None:
    """The degrees of freedom of a ``chisquare`` input (its last part ``dof<k>``, k >= 1); None if absent."""
    last = name.rsplit(".", 1)[-1]
    digits = last[3:] if last.startswith("dof") else ""
    return int(digits) if digits.isdigit() and int(digits) >= 1 else None


def node_seed(base: int, index: int) -> float:
    """Seed attribute of the ``index``-th random node of a graph seeded with ``base`` (``SEED_STRIDE``)."""
    return float((int(base) + SEED_STRIDE * int(index)) % SEED_MODULUS)
