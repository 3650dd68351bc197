"""Bounded supports: bounds, boundary-correction methods, masks and point masses.

Methods (``fit(boundary=...)``):

==========================  =========================================================
``"none"``                  uncorrected estimate cut at the bounds (mass leaks out)
``"reflect"``               reflection across every bounded face, corners included
``"renormalize"``           f_hat(x) / a0(x), a0 = kernel mass inside the support at x
``"renormalize-kernel"``    each kernel divided by its own mass inside the support
``"linear"``                Jones (1993) linear boundary kernel (can go negative)
``"transform"``             log (one bound) / logit (two bounds) transformation
``"beta"``                  Chen (1999) beta kernels, two-sided bounds, diagonal H
``"gamma"``                 Chen (2000) modified gamma kernels, one-sided bounds, diagonal H
==========================  =========================================================

A method that cannot honour a combination refuses with the reason and a
method that can.  ``boundary=None`` picks :data:`DEFAULT_METHOD` (chosen from
the ISE study in ``benchmarks/boundary_ise.md``).  How to add a method:
DEVELOPERS.md, "Boundary methods".
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError, check_choice
from .mask import MaskRenormalization, in_mask, parse_mask
from .asymmetric import BetaKernel, GammaKernel, modified_gamma_shape
from .methods import (KernelRenormalization, LinearBoundaryKernel, NoCorrection, PointwiseRenormalization,
                      Reflection, Transformation, bounded_axes, forward_transform, inside_box, inverse_transform)
from .support import check_inside, has_bounds, outside_rows, parse_bounds

METHODS = {
    "none": NoCorrection,
    "reflect": Reflection,
    "renormalize": PointwiseRenormalization,
    "renormalize-kernel": KernelRenormalization,
    "linear": LinearBoundaryKernel,
    "transform": Transformation,
    "beta": BetaKernel,
    "gamma": GammaKernel,
}
BOUNDARY_METHODS = tuple(METHODS)
OUTSIDE_OPTIONS = ("error", "drop")

# Chosen from benchmarks/boundary_ise.md (mean ISE within two bandwidths of the
# bound): see README "Bounded variables" for the reasoning.
DEFAULT_METHOD = {"one-sided": "linear", "two-sided": "linear"}
# used by boundary=None when the default cannot honour the kernel and H
DEFAULT_FALLBACK = "reflect"

__all__ = [
    "BOUNDARY_METHODS", "DEFAULT_FALLBACK", "DEFAULT_METHOD", "METHODS", "OUTSIDE_OPTIONS", "build_model",
    "check_inside", "check_method", "forward_transform", "has_bounds", "in_mask", "inside_box",
    "inverse_transform", "modified_gamma_shape", "outside_rows", "parse_bounds", "parse_mask",
    "validate_method",
]


def validate_method(method, bounds) -> str:
    """The method name, with ``None`` resolved to the default for these bounds.

    Parameters
    ----------
    method : str or None
        A name in ``BOUNDARY_METHODS``.
    bounds : list of (float, float)

    Returns
    -------
    str
        'none' when ``method`` is None and nothing is bounded.
    """
    if method is None:
        if not has_bounds(bounds):
            return "none"
        two = any(math.isfinite(lo) and math.isfinite(hi) for lo, hi in bounds)
        return DEFAULT_METHOD["two-sided" if two else "one-sided"]
    return check_choice("boundary", method, BOUNDARY_METHODS)


def check_method(method: str, bounds, data, names) -> None:
    """Refuse combinations a method cannot honour (before any bandwidth is chosen).

    Parameters
    ----------
    method : str
    bounds : list of (float, float)
    data : ndarray, shape (n, d)
    names : list of str

    Raises
    ------
    InputError
        Beta kernels with a one-sided bound, gamma kernels with two, or data on a bound under 'transform'.
    """
    B = bounded_axes(bounds)
    if method == "beta":
        one = [names[j] for j in B if not (math.isfinite(bounds[j][0]) and math.isfinite(bounds[j][1]))]
        if one:
            raise InputError(
                f"boundary='beta' needs both bounds on every bounded variable (beta kernels live on an "
                f"interval), but {', '.join(one)} has one: use boundary='gamma' for one-sided bounds, "
                "or boundary='reflect'")
    if method == "gamma":
        two = [names[j] for j in B if math.isfinite(bounds[j][0]) and math.isfinite(bounds[j][1])]
        if two:
            raise InputError(
                f"boundary='gamma' handles one-sided bounds only (gamma kernels live on a half-line), "
                f"but {', '.join(two)} has two: use boundary='beta' for two-sided bounds, or "
                "boundary='reflect'")
    if method == "transform":
        for j in B:
            lo, hi = bounds[j]
            at = int(np.sum((data[:, j] == lo) | (data[:, j] == hi)))
            if at:
                raise InputError(
                    f"boundary='transform' maps the bound of {names[j]} to infinity, and {at} value(s) "
                    f"lie exactly on it: declare them a point mass (point_masses=), or use "
                    "boundary='reflect'")


def selection_data(method: str, data, bounds):
    """The data a bandwidth selector sees: transformed for ``"transform"``.

    Parameters
    ----------
    method : str
    data : ndarray, shape (n, d)
    bounds : list of (float, float)

    Returns
    -------
    ndarray, shape (n, d)
    """
    if method == "transform":
        return forward_transform(data, bounds)
    return data


def build_model(method: str, data, weights, bw, kernel, bounds, engine, names, mask=None):
    """The fitted boundary model (see :mod:`mvkde.boundary.methods`).

    Parameters
    ----------
    method : str
        A key of ``METHODS``; ignored when ``mask`` is given.
    data : ndarray, shape (n, d)
        In data units (transformed here for 'transform').
    weights : ndarray, shape (n,), or None
    bw : BandwidthMatrix
        For 'transform', in the transformed space.
    kernel : MultivariateKernel
    bounds : list of (float, float)
    engine : {'auto', 'exact', 'binned', 'tree'}
    names : list of str
    mask : tuple of (ndarray of bool, list of ndarray), optional
        As returned by :func:`parse_mask`: a renormalisation to the mask is built instead.

    Returns
    -------
    model
        A boundary model with the interface of ``methods._Base``.
    """
    if mask is not None:
        values, axes = mask
        return MaskRenormalization(data, weights, bw, kernel, bounds, engine, names, values, axes)
    cls = METHODS[method]
    if method == "transform":
        return cls(forward_transform(data, bounds), weights, bw, kernel, bounds, engine, names)
    return cls(data, weights, bw, kernel, bounds, engine, names)
