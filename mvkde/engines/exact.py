"""Exact engine: chunked direct kernel sums at arbitrary points.

The data and the points are centred and whitened once by the Cholesky factor
of H; each chunk of points then costs one (chunk, n) matrix of kernel values,
so memory stays bounded by ``chunk_elements`` whatever n and m are (never an
n x m x d array).  Gaussian and spherical kernels need only squared whitened
distances, computed as ``|p|^2 + |x|^2 - 2 p.x`` with a BLAS product.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import logsumexp

from ..bandwidth.matrix import BandwidthMatrix
from ..kernels import MultivariateKernel

CHUNK_ELEMENTS = 1 << 22  # 4 Mi doubles = 32 MB per working matrix


def _prepare(points, data, bw: BandwidthMatrix):
    centre = data.mean(axis=0)
    z = bw.whiten(data - centre)
    p = bw.whiten(np.asarray(points, dtype=float) - centre)
    return p, z


def _neg_half_sq_dist(pc: np.ndarray, z: np.ndarray, z2h: np.ndarray) -> np.ndarray:
    """-|p - x|^2 / 2 for every pair of a chunk, in place on one matrix."""
    g = pc @ z.T
    g -= 0.5 * np.einsum("ij,ij->i", pc, pc)[:, None]
    g -= z2h[None, :]
    np.minimum(g, 0.0, out=g)
    return g


def kernel_matrix(mk: MultivariateKernel, pc: np.ndarray, z: np.ndarray, z2h=None) -> np.ndarray:
    """Kernel values K(p_a - x_i) of whitened points against whitened data, shape (m, n).

    The unit-covariance kernel, not divided by |H|^{1/2}.

    Parameters
    ----------
    mk : MultivariateKernel
    pc : ndarray, shape (m, d)
        Whitened points.
    z : ndarray, shape (n, d)
        Whitened data.
    z2h : ndarray, shape (n,), optional
        ``|z_i|^2 / 2``, computed when not given (used by the Gaussian kernel only).

    Returns
    -------
    ndarray, shape (m, n)
    """
    if mk.name == "gaussian":
        if z2h is None:
            z2h = 0.5 * np.einsum("ij,ij->i", z, z)
        g = _neg_half_sq_dist(pc, z, z2h)
        np.exp(g, out=g)
        g *= (2.0 * math.pi) ** (-0.5 * mk.d)
        return g
    if mk.is_radial:
        # differences formed directly, one axis at a time: the kernels with a kink at the
        # centre (triangular, uniform, cosine profiles in |z|) would turn the rounding of
        # |p|^2 + |x|^2 - 2 p.x near zero into an error of order sqrt(eps) through |z|
        r2 = (pc[:, None, 0] - z[None, :, 0]) ** 2
        for j in range(1, mk.d):
            r2 += (pc[:, None, j] - z[None, :, j]) ** 2
        return mk.evaluate_radial(r2)
    out = mk.univariate.unit(pc[:, None, 0] - z[None, :, 0])
    for j in range(1, mk.d):
        out *= mk.univariate.unit(pc[:, None, j] - z[None, :, j])
    return out


def density(points, data, weights, bw: BandwidthMatrix, mk: MultivariateKernel,
            chunk_elements: int = CHUNK_ELEMENTS) -> np.ndarray:
    """f(x) = sum_i w_i K_H(x - X_i) with weights summing to one.

    Parameters
    ----------
    points : array_like, shape (m, d)
    data : ndarray, shape (n, d)
    weights : ndarray, shape (n,), or None
        None gives every datum weight 1/n.
    bw : BandwidthMatrix
    mk : MultivariateKernel
    chunk_elements : int, optional
        Largest number of kernel values held at once.

    Returns
    -------
    ndarray, shape (m,)
    """
    n = data.shape[0]
    w = np.full(n, 1.0 / n) if weights is None else weights
    p, z = _prepare(points, data, bw)
    z2h = 0.5 * np.einsum("ij,ij->i", z, z)
    out = np.empty(p.shape[0])
    step = max(1, chunk_elements // max(n, 1))
    for a in range(0, p.shape[0], step):
        out[a:a + step] = kernel_matrix(mk, p[a:a + step], z, z2h) @ w
    return out / bw.sqrt_det


def log_density(points, data, weights, bw: BandwidthMatrix, mk: MultivariateKernel,
                chunk_elements: int = CHUNK_ELEMENTS) -> np.ndarray:
    """log f(x); for the Gaussian kernel a log-sum-exp, finite far into the tails.

    Other kernels take the log of :func:`density` (-inf where it is zero).

    Parameters
    ----------
    points, data, weights, bw, mk, chunk_elements
        As for :func:`density`.

    Returns
    -------
    ndarray, shape (m,)
    """
    if mk.name != "gaussian":
        with np.errstate(divide="ignore"):
            return np.log(np.maximum(density(points, data, weights, bw, mk, chunk_elements), 0.0))
    n = data.shape[0]
    logw = np.full(n, -math.log(n)) if weights is None else np.log(weights)
    p, z = _prepare(points, data, bw)
    z2h = 0.5 * np.einsum("ij,ij->i", z, z)
    out = np.empty(p.shape[0])
    step = max(1, chunk_elements // max(n, 1))
    for a in range(0, p.shape[0], step):
        g = _neg_half_sq_dist(p[a:a + step], z, z2h)
        g += logw[None, :]
        out[a:a + step] = logsumexp(g, axis=1)
    return out - 0.5 * mk.d * math.log(2.0 * math.pi) - 0.5 * bw.log_det
