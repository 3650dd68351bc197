"""Tree engine: neighbour sums with a KD-tree on the whitened data.

For a kernel with compact support only the data within the support of
``K_H(x - .)`` contribute at ``x``.  In whitened coordinates ``z = L^{-1} x``
that support is a ball of radius ``a`` (spherical form: Euclidean distance)
or a cube of half-width ``a`` (product form: Chebyshev distance), so a
KD-tree (``scipy.spatial.cKDTree``) on the whitened data finds every
contributing pair and the cost grows with the number of neighbours, not
with n x m.  The sums are then the exact sums up to rounding.

The Gaussian kernel is truncated at the whitened radius
``R = sqrt(2 log(1 / (max_i w_i tol)))``: every dropped term is below
``exp(-R^2/2) K_H(0) = tol max_i w_i K_H(0)``, and ``max_i w_i K_H(0)`` is at
most the peak of the estimate (the estimate at the heaviest datum is at
least that), so the truncation error at any point is below
``tol x (dropped weight) x peak``.  The exact engine stays the default for
the Gaussian kernel; this one is used only when asked for.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.spatial import cKDTree

from ..bandwidth.matrix import BandwidthMatrix
from ..kernels import MultivariateKernel

PAIR_BUDGET = 1 << 21     # neighbour pairs held at once (about 50 MB of work arrays)
DEFAULT_TOL = 1e-3        # Gaussian truncation, relative to the peak density

__all__ = ["density", "search_radius", "DEFAULT_TOL"]


def search_radius(mk: MultivariateKernel, max_weight: float, tol: float = DEFAULT_TOL):
    """(radius, Minkowski p) of the whitened neighbourhood that carries the kernel.

    Parameters
    ----------
    mk : MultivariateKernel
    max_weight : float
        Largest weight of a datum (sets the Gaussian truncation radius).
    tol : float, optional
        Gaussian truncation tolerance relative to the peak density.

    Returns
    -------
    radius : float
    p : float
        2 (Euclidean ball) or inf (Chebyshev cube, product kernels with d > 1).
    """
    if not mk.is_compact:
        return math.sqrt(2.0 * math.log(max(1.0 / (max_weight * tol), math.e))), 2.0
    if mk.is_radial:
        return mk.radius, 2.0
    if mk.d == 1:
        return mk.univariate.unit_radius, 2.0
    return mk.univariate.unit_radius, math.inf


def _pair_kernel(mk: MultivariateKernel, p, z, i, j, v):
    if mk.name == "gaussian":
        return np.exp(-0.5 * v * v) * (2.0 * math.pi) ** (-0.5 * mk.d)
    if mk.is_radial:
        return mk.evaluate_radial(v * v)
    return mk.evaluate(p[i] - z[j])


def density(points, data, weights, bw: BandwidthMatrix, mk: MultivariateKernel,
            tol: float = DEFAULT_TOL) -> np.ndarray:
    """f(x) = sum_i w_i K_H(x - X_i) over the neighbours of each point.

    Parameters
    ----------
    points : array_like, shape (m, d)
    data : ndarray, shape (n, d)
    weights : array_like, shape (n,), or None
        None gives every datum weight 1/n.
    bw : BandwidthMatrix
    mk : MultivariateKernel
    tol : float, optional
        Gaussian truncation tolerance relative to the peak density.

    Returns
    -------
    ndarray, shape (m,)
    """
    n = data.shape[0]
    w = np.full(n, 1.0 / n) if weights is None else np.asarray(weights, dtype=float)
    centre = data.mean(axis=0)
    z = bw.whiten(data - centre)
    p = bw.whiten(np.asarray(points, dtype=float) - centre)
    radius, norm = search_radius(mk, float(w.max()), tol)
    tree = cKDTree(z, leafsize=16, balanced_tree=False, compact_nodes=False)
    out = np.zeros(p.shape[0])
    if p.shape[0] == 0:
        return out
    # size the point chunks from the neighbour count of a few points
    probe = p[np.linspace(0, p.shape[0] - 1, min(64, p.shape[0])).astype(int)]
    mean_nb = float(np.mean(tree.query_ball_point(probe, radius, p=norm, return_length=True)))
    step = int(max(1, min(p.shape[0], PAIR_BUDGET // max(mean_nb, 1.0))))
    for a in range(0, p.shape[0], step):
        pc = p[a:a + step]
        pairs = cKDTree(pc, leafsize=16).sparse_distance_matrix(tree, radius, p=norm,
                                                                output_type="ndarray")
        if pairs.size == 0:
            continue
        i = pairs["i"]
        j = pairs["j"]
        v = pairs["v"] if norm == 2.0 else None  # Chebyshev: product kernels use the offsets
        k = _pair_kernel(mk, pc, z, i, j, v)
        out[a:a + step] = np.bincount(i, weights=k * w[j], minlength=pc.shape[0])
    return out / bw.sqrt_det
