"""Evaluation engines and the automatic choice between them.

Every engine evaluates ``f(x) = sum_i w_i |H|^{-1/2} K(L^{-1}(x - X_i))`` for a
unit-covariance kernel K.  Two entry points serve the rest of the library:

* :func:`evaluate_points` -- density at scattered points, shape (m,);
* :func:`evaluate_grid`   -- density on the tensor grid given by ``axes``,
  shape ``tuple(len(a) for a in axes)``.

Both return ``(values, choice)`` where ``choice`` is an :class:`EngineChoice`
(engine name and the reason it was picked), stored by the estimate in its
attributes.  The boundary methods call these same functions with reflected
data, transformed points, etc., so every engine serves every method that it
can.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import check_choice
from . import exact

ENGINES = ("auto", "exact")

__all__ = ["ENGINES", "EngineChoice", "choose", "evaluate_grid", "evaluate_points", "exact",
           "validate_engine"]


@dataclass(frozen=True)
class EngineChoice:
    engine: str
    reason: str

    def as_attrs(self) -> dict:
        return {"engine": self.engine, "engine_reason": self.reason}


def validate_engine(name) -> str:
    return check_choice("engine", name, ENGINES)


def choose(requested: str, *, kind: str, n: int, m: int, d: int, kernel) -> EngineChoice:
    """Pick an engine for ``m`` evaluation nodes (``kind`` is 'grid' or 'points')."""
    requested = validate_engine(requested)
    if requested == "exact":
        return EngineChoice("exact", "requested by the caller")
    return EngineChoice("exact", f"direct sums over n={n} data at m={m} {kind} nodes "
                                 "(the only engine available)")


def evaluate_points(points, data, weights, bw, kernel, engine="auto", *, log=False):
    """Density (or log density) at ``points`` (m, d)."""
    choice = choose(engine, kind="points", n=data.shape[0], m=points.shape[0], d=data.shape[1],
                    kernel=kernel)
    if log:
        return exact.log_density(points, data, weights, bw, kernel), choice
    return exact.density(points, data, weights, bw, kernel), choice


def evaluate_grid(axes, data, weights, bw, kernel, engine="auto"):
    """Density on the tensor grid ``axes`` (a list of d increasing 1-D arrays)."""
    shape = tuple(len(a) for a in axes)
    choice = choose(engine, kind="grid", n=data.shape[0], m=int(np.prod(shape)), d=data.shape[1],
                    kernel=kernel)
    mesh = np.meshgrid(*axes, indexing="ij")
    pts = np.column_stack([g.ravel() for g in mesh])
    return exact.density(pts, data, weights, bw, kernel).reshape(shape), choice
