"""The binned engines' refinement rounds: what a round accepts, and the next refinement.

Shared by the plain lattice (:mod:`mvkde.engines.binned`) and the lattice with
periodic axes (:mod:`mvkde.engines.periodic`): a cell whose error estimate
meets the tolerance (or that is in the last round) keeps its grid; the others
get a finer lattice, predicted from how the estimate falls with the bin width.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["BinnedInfo", "accept_round", "next_refinement"]


@dataclass(frozen=True)
class BinnedInfo:
    """What the binned engine did for one cell."""

    refinement: tuple[int, ...]
    lattice: tuple[int, ...]
    error_estimate: float        # SAFETY * max |leading binning error| / peak
    tolerance: float
    dropped_weight: float        # weight of data beyond the kernel's reach of the grid
    met: bool                    # error_estimate <= tolerance

    def describe(self) -> str:
        """One sentence on the refinement, the error estimate and any dropped weight.

        Returns
        -------
        str
        """
        r = "x".join(map(str, self.refinement))
        lat = "x".join(map(str, self.lattice))
        text = (f"refinement {r} (lattice {lat}), estimated binning error "
                f"{self.error_estimate:.2g} x peak (tolerance {self.tolerance:.2g})")
        if not self.met:
            text += ": TOLERANCE NOT MET (lattice size limit)"
        if self.dropped_weight > 0:
            text += f"; weight {self.dropped_weight:.3g} beyond the kernel's reach dropped"
        return text


def accept_round(todo, vals, err, dropped, r, lattice, tol, last, values, window, infos) -> list:
    """Keep the grid and the :class:`BinnedInfo` of every cell of ``todo`` that met ``tol``
    (all of them in the ``last`` round); return the positions in ``todo`` of the others.

    Parameters
    ----------
    todo : ndarray of int
        Cells of this round.
    vals, err, dropped : ndarray
        The round's values at the output nodes, error estimates / peak, dropped weights.
    r, lattice : sequence of int
        The round's refinement and lattice shape.
    tol : float
    last : bool
    values : ndarray, shape (cells, *grid)
        Filled in place inside ``window`` (a tuple of slices).
    window : sequence of slice
    infos : list
        Filled in place.

    Returns
    -------
    list of int
    """
    failing = []
    for k, c in enumerate(todo):
        met = bool(err[k] <= tol)
        if met or last:
            values[(c,) + tuple(window)] = vals[k]
            infos[c] = BinnedInfo(tuple(int(v) for v in r), tuple(int(v) for v in lattice), float(err[k]), tol,
                                  float(dropped[k]), met)
        else:
            failing.append(k)
    return failing


def next_refinement(r, err, tol, width, order) -> np.ndarray:
    """The refinement for cells whose error estimates ``err`` missed ``tol``.

    The estimate is taken to fall like (bin width)^``order``; the growth is shared
    between axes in proportion to the squared whitened bin widths ``width`` (per
    axis, the widest of the failing cells).  The new refinement comes from the
    predicted factor per axis, not a multiple of the old one (rounding the
    factor up to an integer overshot 4x4 to 6x6); it at least doubles when the
    prediction would not change it.

    Parameters
    ----------
    r : ndarray of int, shape (d,)
    err : ndarray
    tol, order : float
    width : ndarray, shape (d,)

    Returns
    -------
    ndarray of int, shape (d,)
    """
    need = float(np.max(err)) / tol
    share = width ** 2
    share = share / share.sum()
    new = np.maximum(r, np.ceil(r * (need * len(r) * share) ** (1.0 / order) - 1e-9).astype(np.int64))
    return r * 2 if np.all(new == r) else new
