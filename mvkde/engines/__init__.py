"""Evaluation engines and the automatic choice between them.

Each engine evaluates ``sum_i w_i K_H(x - X_i)``; :func:`choose` picks one
for a request and says why, and the reason is stored in the estimate's and
the grid's attributes.
"""

from __future__ import annotations

from ..errors import InputError, check_choice
from . import exact

ENGINES = ("auto", "exact")

__all__ = ["ENGINES", "choose", "exact"]


def choose(requested: str, *, kind: str, n: int, m: int, d: int, kernel: str) -> tuple[str, str]:
    """Return ``(engine, reason)`` for evaluating ``m`` points (``kind`` 'grid' or 'points')."""
    requested = check_choice("engine", requested, ENGINES)
    if requested == "exact":
        return "exact", "requested by the caller"
    return "exact", f"direct sums over n={n} data at m={m} {kind} nodes (the only engine available)"


def validate_engine(name) -> str:
    try:
        return check_choice("engine", name, ENGINES)
    except InputError:
        raise
