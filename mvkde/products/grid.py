"""Products of densities on a regular grid, for one cell or many at once.

The one place where a gridded density is integrated: node weights (the
trapezoid rule per axis; node areas on the sphere), integrating axes out
(marginals), cumulative sums (joint CDF and exceedance), highest-density-
region levels and marginal quantiles.  The estimate (:mod:`mvkde.products`),
the pipeline's output products and the pictures all call these functions,
so the numbers in a file, ``est.hdr_levels()`` and the contour that
``mvkde plot`` draws agree.

Every function takes ``values`` with any number of leading (cell) axes
before the grid axes; ``nlead`` says how many.

The quadrature is the trapezoid rule on the nodes: on an axis spanning one
period with both ends (a circular variable's grid ``linspace(0, period, m)``)
it equals the periodic trapezoid rule, the repeated node carrying half a
spacing at each end.  On a latitude/longitude pair the weights are the node
areas in km^2 (:func:`mvkde.directional.node_areas_km2`), matching a
density per km^2.

References
----------
Hyndman, R. J. (1996). Computing and graphing highest density regions.
The American Statistician 50, 120-126.
"""

from __future__ import annotations

import numpy as np
from scipy import integrate

from ..directional import node_areas_km2
from ..errors import InputError

__all__ = ["trapezoid_weights", "GridWeights", "node_weights", "integrate_out", "cumulative", "hdr_levels",
           "mass_above", "quantiles"]


def trapezoid_weights(axis) -> np.ndarray:
    """Trapezoid-rule weights of the nodes of one increasing axis.

    Parameters
    ----------
    axis : array_like of float
        The nodes.

    Returns
    -------
    ndarray
        Half the spacing on each side of every node (zeros for one node).
    """
    axis = np.asarray(axis, dtype=float)
    w = np.zeros(axis.size)
    if axis.size > 1:
        dx = np.diff(axis)
        w[:-1] += dx / 2
        w[1:] += dx / 2
    return w


class GridWeights:
    """Integration weights of a grid, kept as factors (one per axis, one per spherical pair).

    Parameters
    ----------
    axes : list of ndarray
        The grid's axes.
    sphere : (int, int), optional
        Indices of a latitude and a longitude axis (degrees) forming a
        location on the sphere: their joint factor is the node area in km^2.
    """

    def __init__(self, axes, sphere=None):
        self.axes = [np.asarray(a, dtype=float) for a in axes]
        self.shape = tuple(a.size for a in self.axes)
        self.factors: list[tuple[tuple[int, ...], np.ndarray]] = []
        pair = tuple(sphere) if sphere is not None else ()
        for k, a in enumerate(self.axes):
            if k not in pair:
                self.factors.append(((k,), trapezoid_weights(a)))
        if pair:
            ia, ib = pair
            area = node_areas_km2(self.axes[ia], self.axes[ib])
            self.factors.append(((ia, ib), area) if ia < ib else ((ib, ia), area.T))

    def full(self) -> np.ndarray:
        """The weight of every node, shape of the grid.

        Returns
        -------
        ndarray
            Product of the factors, broadcast to the grid's shape.
        """
        w = np.ones(self.shape)
        for dims, f in self.factors:
            w = w * f.reshape([self.shape[k] if k in dims else 1 for k in range(len(self.shape))])
        return w

    def integrate(self, values, keep, nlead: int = 0) -> np.ndarray:
        """Integrate every grid axis not in ``keep`` out of ``values`` (kept axes stay in order).

        Parameters
        ----------
        values : array_like of float
            Values on the grid, after ``nlead`` leading axes.
        keep : iterable of int
            Grid axes to keep (a spherical pair both or neither).
        nlead : int
            Number of leading (cell) axes of ``values`` before the grid axes.

        Returns
        -------
        ndarray
            ``values`` with the other grid axes summed out against their weights.
        """
        keep = set(keep)
        d = len(self.shape)
        out = np.asarray(values, dtype=float)
        gone = []
        for dims, f in self.factors:
            inside = [k in keep for k in dims]
            if all(inside):
                continue
            if any(inside):
                raise InputError("a latitude and longitude form one location on the sphere: keep both or neither")
            out = out * f.reshape([1] * nlead + [self.shape[k] if k in dims else 1 for k in range(d)])
            gone += list(dims)
        return out.sum(axis=tuple(nlead + k for k in sorted(gone))) if gone else out


def node_weights(axes, periods=None, sphere=None) -> np.ndarray:
    """Integration weight of every node of the grid ``axes`` (shape of the grid).

    ``periods`` is accepted for symmetry with the estimate's description of a
    variable; the trapezoid rule on ``linspace(0, period, m)`` already is the
    periodic rule.  ``sphere`` = (latitude index, longitude index) uses node
    areas in km^2 for that pair.

    Parameters
    ----------
    axes : list of array_like
        The grid's axes.
    periods : list of float or None, optional
        Unused (see above).
    sphere : (int, int), optional
        Indices of the latitude and longitude axes.

    Returns
    -------
    ndarray
        Node weights, shape of the grid.
    """
    return GridWeights(axes, sphere).full()


def integrate_out(values, axes, keep, nlead: int = 0, sphere=None) -> np.ndarray:
    """Marginal on the kept axes: integrate every other grid axis out (trapezoid rule).

    Parameters
    ----------
    values : array_like of float
        Values on the grid, after ``nlead`` leading axes.
    axes : list of array_like
        The grid's axes.
    keep : iterable of int
        Grid axes to keep.
    nlead : int
        Number of leading (cell) axes of ``values`` before the grid axes.
    sphere : (int, int), optional
        Indices of a latitude and a longitude axis (node areas in km^2).

    Returns
    -------
    ndarray
        The marginal, leading axes then the kept axes in their order.
    """
    return GridWeights(axes, sphere).integrate(values, keep, nlead)


def cumulative(values, axes, *, upper: bool, nlead: int = 0) -> np.ndarray:
    """Joint CDF (``upper=False``) or joint exceedance (``upper=True``) at every node.

    Cumulative trapezoid sums along each grid axis in turn: P(X <= x) from the
    first node, or P(X > x) from the last.  Mass outside the grid is not counted.

    Parameters
    ----------
    values : array_like of float
        Density on the grid, after ``nlead`` leading axes.
    axes : list of array_like
        The grid's axes.
    upper : bool
        True for the exceedance, False for the CDF.
    nlead : int
        Number of leading (cell) axes of ``values`` before the grid axes.

    Returns
    -------
    ndarray
        Probabilities, shape of ``values``.
    """
    out = np.asarray(values, dtype=float)
    for k, a in enumerate(axes):
        ax = nlead + k
        a = np.asarray(a, dtype=float)
        if upper:
            out = np.flip(integrate.cumulative_trapezoid(np.flip(out, axis=ax), -np.flip(a), axis=ax, initial=0.0),
                          axis=ax)
        else:
            out = integrate.cumulative_trapezoid(out, a, axis=ax, initial=0.0)
    return out


def hdr_levels(values, weights, masses, nlead: int = 0) -> np.ndarray:
    """Density levels f_a whose upper sets {f >= f_a} hold the fractions ``masses`` of the grid's mass.

    Node densities (negative values and NaN count as 0) are sorted in
    decreasing order and their masses (density x node weight) accumulated
    (Hyndman 1996 computes the same level from the density at the data).

    Parameters
    ----------
    values : array_like of float
        Density on the grid, after ``nlead`` leading axes.
    weights : array_like of float
        Node weights, broadcastable to the grid's shape.
    masses : float or sequence of float
        Fractions strictly between 0 and 1.
    nlead : int
        Number of leading (cell) axes of ``values`` before the grid axes.

    Returns
    -------
    ndarray, shape (*lead, len(masses))
        The levels; NaN where a cell has no mass.

    References
    ----------
    Hyndman, R. J. (1996). Computing and graphing highest density regions.
    The American Statistician 50, 120-126.
    """
    masses = np.atleast_1d(np.asarray(masses, dtype=float))
    if np.any((masses <= 0) | (masses >= 1)) or not np.all(np.isfinite(masses)):
        raise InputError("HDR masses must lie strictly between 0 and 1")
    values = np.asarray(values, dtype=float)
    lead = values.shape[:nlead]
    flat = np.maximum(np.nan_to_num(values, nan=0.0), 0.0).reshape(lead + (-1,))
    w = np.broadcast_to(np.asarray(weights, dtype=float), values.shape[nlead:]).ravel()
    order = np.argsort(-flat, axis=-1, kind="stable")
    fs = np.take_along_axis(flat, order, axis=-1)
    cum = np.cumsum(fs * w[order], axis=-1)
    total = cum[..., -1:]
    out = np.full(lead + (masses.size,), np.nan)
    for idx in np.ndindex(*lead):
        if not total[idx][0] > 0:
            continue
        pos = np.searchsorted(cum[idx] / total[idx][0], masses)
        out[idx] = fs[idx][np.clip(pos, 0, fs.shape[-1] - 1)]
    return out


def mass_above(values, weights, levels) -> np.ndarray:
    """Fraction of the grid's mass where the density is at least each of ``levels`` (one cell).

    Parameters
    ----------
    values : array_like of float
        Density on the grid (negative values and NaN count as 0).
    weights : array_like of float
        Node weights, broadcastable to the shape of ``values``.
    levels : float or array_like of float
        Density levels.

    Returns
    -------
    ndarray, shape (len(levels),)
        Fractions; NaN when the grid holds no mass.
    """
    v = np.maximum(np.nan_to_num(np.asarray(values, dtype=float), nan=0.0), 0.0).ravel()
    m = v * np.broadcast_to(np.asarray(weights, dtype=float), np.shape(values)).ravel()
    total = m.sum()
    levels = np.atleast_1d(np.asarray(levels, dtype=float))
    return np.array([m[v >= lv].sum() / total if total > 0 else np.nan for lv in levels])


def quantiles(marginal, axis, probs, *, base=None, bound=float("nan")) -> np.ndarray:
    """Quantiles from marginal densities on ``axis`` (last axis of ``marginal``; leading axes are cells).

    The CDF is the cumulative trapezoid sum, normalised to the cell's total
    mass; ``base`` (per cell) is a point mass at ``bound`` below the axis,
    so probabilities up to ``base / total`` map to ``bound``.

    Parameters
    ----------
    marginal : array_like of float
        Marginal densities, the last axis on ``axis``.
    axis : array_like of float
        Nodes of the variable.
    probs : float or array_like of float
        Probabilities strictly between 0 and 1.
    base : float or array_like of float, optional
        Point-mass probability per cell (0 when None).
    bound : float
        Value of the point mass.

    Returns
    -------
    ndarray, shape (*lead, len(probs))
        The quantiles; NaN for a cell without a finite, positive marginal.
    """
    probs = np.atleast_1d(np.asarray(probs, dtype=float))
    if np.any((probs <= 0) | (probs >= 1)) or not np.all(np.isfinite(probs)):
        raise InputError("quantile probabilities must lie strictly between 0 and 1")
    m = np.asarray(marginal, dtype=float)
    axis = np.asarray(axis, dtype=float)
    c = integrate.cumulative_trapezoid(np.nan_to_num(m, nan=0.0), axis, axis=-1, initial=0.0)
    base = np.zeros(m.shape[:-1]) if base is None else np.nan_to_num(np.asarray(base, dtype=float), nan=0.0)
    base = np.broadcast_to(base, m.shape[:-1])
    total = base + c[..., -1]
    out = np.full(m.shape[:-1] + (probs.size,), np.nan)
    for idx in np.ndindex(*m.shape[:-1]):
        if not np.isfinite(m[idx]).all() or not total[idx] > 0:
            continue
        cdf = (base[idx] + c[idx]) / total[idx]
        keep = np.concatenate([[True], np.diff(cdf) > 0])
        vals = np.interp(probs, cdf[keep], axis[keep])
        if base[idx] > 0:  # probabilities inside the point mass map to the bound
            vals = np.where(probs <= base[idx] / total[idx], bound, vals)
        out[idx] = vals
    return out
