"""A point mass at the lower bound of one variable (dry days, calm winds).

Values ``<= threshold`` of the variable count as its bound.  The estimate is
a mixture: with probability ``p`` the variable sits on its bound and the
other variables follow their own density on the point mass (``estimate``);
with probability ``1 - p`` all variables follow the continuous estimate above
the threshold.  :func:`declare` checks the declaration, :func:`split` finds
the point-mass rows of a sample; :func:`mvkde.fit` fits both parts.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError
from ..support import PointMass as Declaration

__all__ = ["PointMassPart", "declare", "split"]


class PointMassPart:
    """The fitted point mass of one variable: its rows, probability and the others' density on it."""

    def __init__(self, declaration: Declaration, rows: np.ndarray, probability: float):
        self.declaration = declaration
        self.index, self.name = declaration.index, declaration.name
        self.threshold, self.bound = declaration.threshold, declaration.bound
        self.rows, self.probability = rows, probability
        self.count = int(rows.sum())
        #: estimate of the other variables on the point mass (None for one variable, or when it failed)
        self.estimate = None
        #: why ``estimate`` could not be fitted ("" when it was)
        self.problem = ""

    def as_attrs(self) -> dict:
        return {"point_mass_variable": self.name, "point_mass_threshold": float(self.threshold),
                "point_mass_bound": float(self.bound), "point_mass_probability": float(self.probability),
                "point_mass_count": self.count}


def declare(point_masses, box, names) -> Declaration | None:
    """Check ``point_masses`` (one entry per variable, None or a threshold) against the bounds."""
    if point_masses is None:
        return None
    try:
        items = list(point_masses)
    except TypeError:
        raise InputError("point_masses must be a list with one entry (None or a threshold) per variable") from None
    d = len(names)
    if len(items) != d:
        raise InputError(f"point_masses has {len(items)} entries but the data have {d} variables ({', '.join(names)})")
    given = [j for j, t in enumerate(items) if t is not None]
    if not given:
        return None
    if len(given) > 1:
        raise InputError(f"point_masses: at most one variable may carry a point mass, got "
                         f"{', '.join(names[j] for j in given)}")
    j = given[0]
    try:
        t = float(items[j])
    except (TypeError, ValueError):
        raise InputError(f"point_masses for {names[j]} must be a number (the threshold), got {items[j]!r}") from None
    lo, hi = box[j]
    if not math.isfinite(lo):
        raise InputError(f"point_masses for {names[j]}: the point mass sits at the lower bound, so {names[j]} "
                         "needs a finite lower bound in bounds= (e.g. (0, None) for precipitation)")
    if not (math.isfinite(t) and lo <= t < hi):
        raise InputError(f"point_masses threshold for {names[j]} must lie in [{lo}, {hi}), got {t}")
    return Declaration(j, names[j], t, lo)


def split(declaration: Declaration | None, values, weights) -> PointMassPart | None:
    """The point-mass rows of a sample and their probability (share of the weight)."""
    if declaration is None:
        return None
    rows = values[:, declaration.index] <= declaration.threshold
    probability = float(rows.sum()) / values.shape[0] if weights is None else float(weights[rows].sum())
    return PointMassPart(declaration, rows, probability)
