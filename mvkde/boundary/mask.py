"""Irregular supports given as a boolean mask on a regular grid.

The support is the union of the mask's cells (a land mask, a catchment).  The
edge correction is the pointwise renormalisation of Diggle (1985):

    f(x) = f_hat(x) / a0(x),    a0(x) = int_mask K_H(x - y) dy,

with ``a0`` the convolution of the mask with the kernel, computed by the
engine itself (the mask's cell centres are the "data", each carrying the cell
volume), so a binned engine does it with one FFT.  The estimate is then
divided by its mass on the mask grid so that it sums to one there.  For a
uniform density on the domain, ``E f_hat = f a0`` exactly, so the corrected
estimate is unbiased up to the edge.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from .. import engines as _engines
from ..errors import InputError
from .methods import _Base, _rejection


def parse_mask(mask, names):
    """(boolean array ordered like ``names``, list of axes) from a DataArray.

    Parameters
    ----------
    mask : xarray.DataArray
        Booleans (or 0/1), one dimension per variable named after it, with evenly spaced coordinates.
    names : list of str

    Returns
    -------
    values : ndarray of bool
    axes : list of ndarray

    Raises
    ------
    InputError
        If the mask is not of that form or has no True cell.
    """
    if not isinstance(mask, xr.DataArray):
        raise InputError(
            "mask must be an xarray.DataArray of booleans with one dimension per variable "
            f"({', '.join(names)}) and the grid coordinates; wrap a plain array as "
            "xarray.DataArray(array, coords={name: axis, ...}, dims=[...])")
    missing = [n for n in names if n not in mask.dims]
    if missing or len(mask.dims) != len(names):
        raise InputError(f"mask has dimensions {list(mask.dims)} but the variables are {names}: "
                         "give it exactly one dimension per variable, named after it")
    mask = mask.transpose(*names)
    axes = []
    for n in names:
        if n not in mask.coords:
            raise InputError(f"mask dimension {n!r} has no coordinate: give the grid values of {n}")
        ax = np.asarray(mask[n].values, dtype=float)
        if ax.size < 2 or not np.all(np.isfinite(ax)):
            raise InputError(f"mask coordinate {n!r} needs at least 2 finite values")
        step = np.diff(ax)
        if np.any(step <= 0) or np.ptp(step) > 1e-6 * abs(step.mean()):
            raise InputError(f"mask coordinate {n!r} must be increasing and evenly spaced")
        axes.append(ax)
    values = np.asarray(mask.values)
    if values.dtype != bool:
        if not np.all(np.isin(values, (0, 1))):
            raise InputError("mask must hold booleans (True inside the support)")
        values = values.astype(bool)
    if not values.any():
        raise InputError("mask has no True cell: the support would be empty")
    return values, axes


def cell_index(points, axes):
    """Index of the nearest grid node per axis, -1 where a point lies outside the grid.

    Parameters
    ----------
    points : ndarray, shape (m, d)
    axes : list of ndarray
        Evenly spaced axes.

    Returns
    -------
    list of ndarray of int, shape (m,)
    """
    idx = []
    for j, ax in enumerate(axes):
        step = ax[1] - ax[0]
        k = np.rint((points[:, j] - ax[0]) / step).astype(np.int64)
        k[(k < 0) | (k >= ax.size)] = -1
        idx.append(k)
    return idx


def in_mask(points, mask, axes) -> np.ndarray:
    """Whether each point's nearest mask node is True (False outside the mask's grid).

    Parameters
    ----------
    points : ndarray, shape (m, d)
    mask : ndarray of bool
    axes : list of ndarray

    Returns
    -------
    ndarray of bool, shape (m,)
    """
    idx = cell_index(points, axes)
    ok = np.logical_and.reduce([k >= 0 for k in idx])
    out = np.zeros(points.shape[0], dtype=bool)
    if ok.any():
        out[ok] = mask[tuple(k[ok] for k in idx)]
    return out


class MaskRenormalization(_Base):
    """Pointwise renormalisation to a support given as a mask of grid cells.

    ``f(x) = f_hat(x) / a0(x)`` inside the mask, zero outside, with ``a0(x)`` the kernel's mass over the mask's
    cells (a kernel sum over the cell centres) and divided by the total mass.  The interface is that of
    ``methods._Base``.

    Parameters
    ----------
    data, weights, bw, kernel, box, engine, names
        As for ``methods._Base``.
    mask : ndarray of bool
    axes : list of ndarray
        The mask's grid, from :func:`parse_mask`.
    """

    name = "mask"
    sample_note = ("rejection from the uncorrected estimate restricted to the mask, acceptance "
                   "min(a0)/a0(x) with min over the mask's nodes")

    def __init__(self, data, weights, bw, kernel, box, engine, names, mask, axes):
        super().__init__(data, weights, bw, kernel, box, engine, names)
        self.mask, self.axes = mask, axes
        self.volume = float(np.prod([ax[1] - ax[0] for ax in axes]))
        mesh = np.meshgrid(*axes, indexing="ij")
        self.centres = np.column_stack([g[mask] for g in mesh])
        self.a0_mask = self._a0_grid(axes)
        f, _ = self._grid(axes, self.data, self.w, self.bw)
        self.constant = float(np.sum(f[mask] / self.a0_mask[mask]) * self.volume)
        self.attrs.update({"mask_cells": int(mask.sum()), "boundary_mass_before_normalisation": self.constant})

    def _a0_grid(self, axes):
        v, _ = _engines.evaluate_grid(axes, self.centres, None, self.bw, self.kernel, self.engine)
        return v * self.centres.shape[0] * self.volume

    def _a0_points(self, pts):
        v, _ = _engines.evaluate_points(pts, self.centres, None, self.bw, self.kernel, self.engine)
        return v * self.centres.shape[0] * self.volume

    def inside(self, pts):
        """Whether each point lies in the mask (:func:`in_mask`).

        Parameters
        ----------
        pts : ndarray, shape (m, d)

        Returns
        -------
        ndarray of bool, shape (m,)
        """
        return in_mask(pts, self.mask, self.axes)

    def density(self, pts, log=False):
        """Renormalised estimate inside the mask, zero outside; as ``methods._Base.density``."""
        out = np.zeros(pts.shape[0])
        ok = self.inside(pts)
        choice = None
        if ok.any():
            f, choice = self._points(pts[ok], self.data, self.w, self.bw)
            out[ok] = f / (self._a0_points(pts[ok]) * self.constant)
        if log:
            with np.errstate(divide="ignore"):
                return np.log(out), choice
        return out, choice

    def grid(self, axes):
        """Renormalised estimate on the grid, zero outside the mask; as ``methods._Base.grid``."""
        f, choice = self._grid(axes, self.data, self.w, self.bw)
        same = len(axes) == len(self.axes) and all(
            a.shape == b.shape and np.allclose(a, b) for a, b in zip(axes, self.axes))
        a0 = self.a0_mask if same else self._a0_grid(axes)
        mesh = np.meshgrid(*axes, indexing="ij")
        pts = np.column_stack([g.ravel() for g in mesh])
        inside = self.inside(pts).reshape(f.shape)
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.where(inside, f / (a0 * self.constant), 0.0)
        return out, choice

    def grid_pieces(self, axes):
        """None: the model is evaluated by :meth:`grid` on its own.

        Parameters
        ----------
        axes : list of ndarray

        Returns
        -------
        None
        """
        # the edge correction is a convolution of the mask: evaluated per model
        return None

    def sample(self, n, rng):
        """Rejection from the plain estimate, acceptance min(a0)/a0(x) in the mask; as ``methods._Base.sample``."""
        lowest = float(self.a0_mask[self.mask].min())

        def accept(y):
            ok = self.inside(y)
            keep = np.zeros(y.shape[0], dtype=bool)
            if ok.any():
                keep[ok] = rng.random(int(ok.sum())) * self._a0_points(y[ok]) < lowest
            return keep

        return _rejection(lambda m: self._bootstrap(m, rng), accept, n,
                          "the uncorrected estimate has almost no mass inside the mask")
