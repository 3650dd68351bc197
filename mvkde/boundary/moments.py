"""Partial moments of the unit-variance univariate kernels.

``M_l(p) = int_{-inf}^{p} u^l K(u) du`` for l = 0, 1, 2, with K the kernel
scaled to unit variance.  The partial moments of a kernel cut by a bound,
``a_l(p) = int_{-1}^{p} u^l K(u) du`` in Jones (1993), are these functions
(on a two-sided support, ``a_l = M_l(p_lo) - M_l(p_hi)``).

Closed forms (Jones 1993, Stat. Comput. 3, 135-146, Sec. 2; re-derived by
integrating the polynomial):

* Gaussian: ``M_0 = Phi(p)``, ``M_1 = -phi(p)``, ``M_2 = Phi(p) - p phi(p)``.
* Epanechnikov on [-1, 1]: ``a_0 = (2 + 3p - p^3)/4``,
  ``a_1 = -(3/16)(1 - p^2)^2``, ``a_2 = (2 + 5p^3 - 3p^5)/20``.

For the other kernels the raw partial moments are tabulated numerically
(composite 8-point Gauss-Legendre, exact on each polynomial piece because the
only kink, at u = 0, is a node boundary) and interpolated with Hermite cubics
whose slopes ``u^l K(u)`` are exact.  A kernel on the raw scale with
``mu2 = s^2`` gives ``M_l^unit(p) = s^{-l} M_l^raw(s p)``.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from scipy import interpolate, special

from ..kernels import Kernel, get_kernel

_SQRT2PI = math.sqrt(2.0 * math.pi)


def _raw_epanechnikov(l: int, p: np.ndarray) -> np.ndarray:
    q = np.clip(p, -1.0, 1.0)
    if l == 0:
        return (2.0 + 3.0 * q - q ** 3) / 4.0
    if l == 1:
        return -(3.0 / 16.0) * (1.0 - q * q) ** 2
    return (2.0 + 5.0 * q ** 3 - 3.0 * q ** 5) / 20.0


@lru_cache(maxsize=None)
def _raw_table(name: str, l: int):
    k = get_kernel(name)
    edges = np.linspace(-1.0, 1.0, 2001)  # 0 is an edge: kinks of the triangular kernel fall on one
    nodes, wts = np.polynomial.legendre.leggauss(8)
    a, b = edges[:-1], edges[1:]
    mid, half = 0.5 * (a + b), 0.5 * (b - a)
    u = mid[:, None] + half[:, None] * nodes[None, :]
    cell = (half[:, None] * wts[None, :] * u ** l * k(u)).sum(axis=1)
    cum = np.concatenate([[0.0], np.cumsum(cell)])
    slope = edges ** l * k(edges)
    return interpolate.CubicHermiteSpline(edges, cum, slope), float(cum[-1])


def raw_partial_moment(kernel: Kernel, l: int, p) -> np.ndarray:
    """``int_{-r}^{p} u^l K(u) du`` on the kernel's standard support.

    Parameters
    ----------
    kernel : Kernel
        Gaussian, or a compact second-order kernel.
    l : {0, 1, 2}
    p : array_like

    Returns
    -------
    ndarray

    Raises
    ------
    ValueError
        For a kernel without partial moments.
    """
    p = np.asarray(p, dtype=float)
    if kernel.name == "gaussian":
        if l == 0:
            return special.ndtr(p)
        if l == 1:
            return -np.exp(-0.5 * p * p) / _SQRT2PI
        return special.ndtr(p) - p * np.exp(-0.5 * p * p) / _SQRT2PI
    if kernel.name == "epanechnikov":
        return _raw_epanechnikov(l, p)
    if not kernel.is_compact or kernel.order != 2:
        raise ValueError(f"no partial moments for kernel {kernel.name!r}")
    spline, total = _raw_table(kernel.name, l)
    q = np.clip(p, -1.0, 1.0)
    out = spline(q)
    # outside the support the moment is exactly 0 (left) or the full moment (right)
    out = np.where(p <= -1.0, 0.0, np.where(p >= 1.0, total, out))
    return out


def partial_moment(kernel: Kernel, l: int, p) -> np.ndarray:
    """``M_l(p) = int_{-inf}^{p} u^l K_unit(u) du`` for the unit-variance kernel.

    Parameters
    ----------
    kernel : Kernel
    l : {0, 1, 2}
    p : array_like

    Returns
    -------
    ndarray
    """
    s = kernel.scale
    return raw_partial_moment(kernel, l, s * np.asarray(p, dtype=float)) / s ** l


def cut_moments(kernel: Kernel, p_lo, p_hi):
    """``(a0, a1, a2)`` of the unit kernel restricted to ``p_hi <= u <= p_lo``.

    With ``u = (x - y)/h`` and ``y`` in ``[lo, hi]``: ``p_lo = (x - lo)/h``
    (``+inf`` for an open side) and ``p_hi = (x - hi)/h`` (``-inf``).

    Parameters
    ----------
    kernel : Kernel
    p_lo, p_hi : ndarray

    Returns
    -------
    a0, a1, a2 : ndarray
    """
    top = np.where(np.isfinite(p_lo), p_lo, 50.0)
    bottom = np.where(np.isfinite(p_hi), p_hi, -50.0)
    if kernel.name == "gaussian":
        # one normal CDF and one density per side serve the three moments (the
        # formulas of raw_partial_moment): a cell's grid and data need this at every node and datum
        s = kernel.scale
        t, b = s * top, s * bottom
        phi_t, phi_b = np.exp(-0.5 * t * t) / _SQRT2PI, np.exp(-0.5 * b * b) / _SQRT2PI
        a0 = special.ndtr(t) - special.ndtr(b)
        return a0, -(phi_t - phi_b) / s, (a0 - (t * phi_t - b * phi_b)) / s ** 2
    return tuple(partial_moment(kernel, l, top) - partial_moment(kernel, l, bottom) for l in range(3))
