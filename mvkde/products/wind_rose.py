"""Wind-rose numbers: joint probabilities per direction sector and speed class, with one rule for the classes."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..errors import InputError
from .estimate import _names_index


SPEED_CLASSES = 5


def speed_class_edges(lo: float, hi: float, given=None, classes: int = SPEED_CLASSES) -> np.ndarray:
    """Edges of the speed classes of a wind-rose table: ``given``, else ``classes`` equal classes on [lo, hi].

    One rule for :func:`sector_table` (``lo, hi`` = the estimate's grid limits
    of the speed variable) and the workflow's ``products.sectors`` (the shared
    grid's limits), so a table computed either way has the same classes.

    Parameters
    ----------
    lo, hi : float
    given : array_like of float, optional
    classes : int

    Returns
    -------
    ndarray
    """
    if given is not None and len(given):
        return np.asarray(given, dtype=float)
    return np.linspace(float(lo), float(hi), int(classes) + 1)


def direction_and_speed(est) -> tuple[str, str]:
    """(direction, speed): the circular variable and the linear one of a 2-variable estimate.

    Parameters
    ----------
    est : DensityEstimate

    Returns
    -------
    direction, speed : str
    """
    circular = [n for n, p in zip(est.names, est.support.periods) if p is not None]
    if est.d != 2 or len(circular) != 1:
        raise InputError("a wind-rose table needs one circular and one linear variable, got "
                         f"{est.names} (circular: {circular or 'none'})")
    return circular[0], next(n for n in est.names if n != circular[0])


def sector_table(est, direction: str, speed: str, sectors=16, speed_edges=None, *, nodes=8):
    """Joint probabilities per direction sector and speed class (the numbers of a wind rose).

    Sector k is centred on ``k * period / sectors`` (north = 0 for degrees) and spans
    half a sector width each side, across the wrap for sector 0.  Speed classes are
    ``[speed_edges[c], speed_edges[c + 1])``; by default five equal classes between the
    estimate's default grid limits of the speed variable (:func:`speed_class_edges`,
    the rule the workflow's ``products.sectors`` uses too).  Each sector x
    class cell is integrated with ``nodes``-point Gauss-Legendre rules in direction
    and (three panels) in speed, so no grid node is counted twice at the wrap.
    The estimate's other variables, if any, are refused: condition first.

    Parameters
    ----------
    est : DensityEstimate
    direction, speed : str
        The circular variable (period 360 if it has none) and the linear one.
    sectors : int
    speed_edges : array_like of float, optional
    nodes : int

    Returns
    -------
    xarray.DataArray
        Dimensions ("sector", "speed_class"); coordinates ``sector`` (centres),
        ``speed_lower``, ``speed_upper``.
    """
    di, si = _names_index(est, [direction, speed])
    if est.d != 2:
        raise InputError("sector_table needs a 2-variable estimate (direction, speed)")
    sectors = int(sectors)
    if sectors < 2:
        raise InputError("sectors must be at least 2")
    periods = est.support.periods
    period = periods[di] if periods[di] is not None else 360.0
    if periods[si] is not None:
        raise InputError(f"sector_table: speed variable {speed!r} is circular; pass the linear variable as speed")
    width = period / sectors
    limits = est.default_limits()
    speed_edges = speed_class_edges(limits[si][0], limits[si][1], speed_edges)
    if speed_edges.ndim != 1 or speed_edges.size < 2 or np.any(np.diff(speed_edges) <= 0) \
            or not np.all(np.isfinite(speed_edges)):
        raise InputError("speed_edges must be at least two finite, increasing values")
    gx, gw = np.polynomial.legendre.leggauss(int(nodes))
    # direction nodes: every sector, Gauss-Legendre inside [centre - width/2, centre + width/2)
    centres = np.arange(sectors) * width
    dnodes = (centres[:, None] + 0.5 * width * gx[None, :]).ravel()
    dweights = np.tile(0.5 * width * gw, sectors)
    # speed nodes: three panels per class
    panels = 3
    s_nodes, s_weights, s_class = [], [], []
    for c in range(speed_edges.size - 1):
        edges = np.linspace(speed_edges[c], speed_edges[c + 1], panels + 1)
        for a, b in zip(edges[:-1], edges[1:]):
            s_nodes.append(0.5 * (a + b) + 0.5 * (b - a) * gx)
            s_weights.append(0.5 * (b - a) * gw)
            s_class.append(np.full(gx.size, c))
    s_nodes, s_weights, s_class = map(np.concatenate, (s_nodes, s_weights, s_class))
    D, S = np.meshgrid(np.mod(dnodes, period), s_nodes, indexing="ij")
    pts = np.empty((D.size, 2))
    pts[:, di], pts[:, si] = D.ravel(), S.ravel()
    f = est.pdf(pts).reshape(D.shape) * dweights[:, None] * s_weights[None, :]
    per_sector = f.reshape(sectors, int(nodes), -1).sum(axis=1)
    table = np.zeros((sectors, speed_edges.size - 1))
    for c in range(speed_edges.size - 1):
        table[:, c] = per_sector[:, s_class == c].sum(axis=1)
    unit = est.units[di] if est.units[di] else ("degree" if period == 360.0 else "")
    return xr.DataArray(table, dims=("sector", "speed_class"),
                        coords={"sector": ("sector", centres, {"units": unit, "long_name": "sector centre"}),
                                "speed_lower": ("speed_class", speed_edges[:-1]),
                                "speed_upper": ("speed_class", speed_edges[1:])},
                        name="sector_probability",
                        attrs={"long_name": "joint probability per direction sector and speed class",
                               "units": "1", "sector_width": float(width),
                               "total_probability": float(table.sum()),
                               "note": "sectors centred on multiples of the width; speed classes "
                                       "[lower, upper); mass beyond the outer speed edges is not counted"})
