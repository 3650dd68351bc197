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

from ..bandwidth import BandwidthMatrix, BandwidthResult
from ..errors import InputError
from ..support import PointMass as Declaration

__all__ = ["PointMassPart", "declare", "split", "Mixture", "EmptyModel", "no_bandwidth"]


class PointMassPart:
    """The fitted point mass of one variable: its rows, probability and the others' density on it.

    Parameters
    ----------
    declaration : PointMass
        From :func:`declare`.
    rows : ndarray of bool, shape (n,)
        The rows at the point mass.
    probability : float
    """

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
        """The point mass as estimate attributes.

        Returns
        -------
        dict
            ``point_mass_variable``, ``_threshold``, ``_bound``, ``_probability`` and ``_count``.
        """
        return {"point_mass_variable": self.name, "point_mass_threshold": float(self.threshold),
                "point_mass_bound": float(self.bound), "point_mass_probability": float(self.probability),
                "point_mass_count": self.count}


def declare(point_masses, box, names) -> Declaration | None:
    """Check ``point_masses`` (one entry per variable, None or a threshold) against the bounds.

    Parameters
    ----------
    point_masses : sequence or None
    box : list of (float, float)
    names : list of str

    Returns
    -------
    PointMass or None
        None when no variable carries a point mass.

    Raises
    ------
    InputError
        Wrong length, more than one point mass, no finite lower bound or a threshold outside [lo, hi).
    """
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
    """The point-mass rows of a sample and their probability (share of the weight).

    Parameters
    ----------
    declaration : PointMass or None
    values : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None
        Summing to one.

    Returns
    -------
    PointMassPart or None
        None when ``declaration`` is None.
    """
    if declaration is None:
        return None
    rows = values[:, declaration.index] <= declaration.threshold
    probability = float(rows.sum()) / values.shape[0] if weights is None else float(weights[rows].sum())
    return PointMassPart(declaration, rows, probability)


class Mixture:
    """(1 - p) x one estimate + p x another, on the same variables: a marginal that drops a point mass.

    Has the interface of the boundary models (``methods._Base``) without ``grid_pieces``.

    Parameters
    ----------
    continuous, on_mass : estimate
        Fitted estimates; ``on_mass`` may be None.
    p : float
        Weight of ``on_mass``.
    """

    def __init__(self, continuous, on_mass, p: float):
        self.parts = [(1.0 - p, continuous)] + ([(p, on_mass)] if on_mass is not None and p > 0 else [])
        self.attrs = {"boundary": continuous.boundary, "mixture_weights": ", ".join(f"{w:.6g}" for w, _ in self.parts)}

    def density(self, pts, log=False):
        """Weighted sum of the parts' pdfs; as ``methods._Base.density`` (the choice is None)."""
        values = sum(w * est.pdf(pts) for w, est in self.parts)
        if log:
            with np.errstate(divide="ignore"):
                return np.log(values), None
        return values, None

    def grid(self, axes):
        """Weighted sum of the parts' grids over the axes' limits; as ``methods._Base.grid`` (choice None)."""
        limits = [(a[0], a[-1]) for a in axes]
        return sum(w * est.grid([len(a) for a in axes], limits).values for w, est in self.parts), None

    def sample(self, n, rng):
        """Multinomial counts per part, drawn from each and shuffled; as ``methods._Base.sample``."""
        counts = rng.multinomial(n, [w for w, _ in self.parts])
        draws = [est.sample(k, rng) for (_, est), k in zip(self.parts, counts) if k]
        out = np.concatenate(draws) if draws else np.empty((0, self.parts[0][1].d))
        return out[rng.permutation(len(out))]


def no_bandwidth(d: int) -> BandwidthResult:
    """The bandwidth of an empty continuous part (every value at the point mass).

    Parameters
    ----------
    d : int

    Returns
    -------
    BandwidthResult
        A matrix of NaN.
    """
    nan = np.full((d, d), np.nan)
    return BandwidthResult(BandwidthMatrix(nan, nan), "none: every value is at the point mass", "full")


class EmptyModel:
    """The continuous part when every value lies at the point mass: zero density.

    Has the interface of the boundary models (``methods._Base``) without ``grid_pieces``.

    Parameters
    ----------
    d : int
    """

    attrs = {"boundary": "none", "continuous_part": "empty: every value is at the point mass"}

    def __init__(self, d: int):
        self.d = d

    def density(self, pts, log=False):
        """Zeros (-inf for log); as ``methods._Base.density`` (the choice is None)."""
        return np.full(pts.shape[0], -np.inf if log else 0.0), None

    def grid(self, axes):
        """Zeros; as ``methods._Base.grid`` (the choice is None)."""
        return np.zeros([len(a) for a in axes]), None

    def sample(self, n, rng):
        """An empty (0, d) array; any ``n`` > 0 raises InputError; as ``methods._Base.sample``."""
        if n:
            raise InputError("the continuous part is empty (every value is at the point mass): nothing to draw")
        return np.empty((0, self.d))
