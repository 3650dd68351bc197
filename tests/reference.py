"""Slow, obviously-correct reference sums that every engine is held to.

Written independently of mvkde.engines: explicit loop over the data, kernel
written out from its textbook formula, whitening by numpy's Cholesky factor.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

# textbook kernels on the standard support (Wand & Jones 1995, Table 2.1)
RAW = {
    "uniform": lambda u: np.where(np.abs(u) <= 1, 0.5, 0.0),
    "triangular": lambda u: np.where(np.abs(u) <= 1, 1 - np.abs(u), 0.0),
    "epanechnikov": lambda u: np.where(np.abs(u) <= 1, 0.75 * (1 - u ** 2), 0.0),
    "biweight": lambda u: np.where(np.abs(u) <= 1, 15 / 16 * (1 - u ** 2) ** 2, 0.0),
    "triweight": lambda u: np.where(np.abs(u) <= 1, 35 / 32 * (1 - u ** 2) ** 3, 0.0),
    "cosine": lambda u: np.where(np.abs(u) <= 1, np.pi / 4 * np.cos(np.pi * np.clip(u, -1, 1) / 2), 0.0),
    "gaussian": lambda u: np.exp(-u ** 2 / 2) / math.sqrt(2 * math.pi),
}
MU2 = {"uniform": 1 / 3, "triangular": 1 / 6, "epanechnikov": 1 / 5, "biweight": 1 / 7,
       "triweight": 1 / 9, "cosine": 1 - 8 / math.pi ** 2, "gaussian": 1.0}


def unit_product_kernel(name, z):
    s = math.sqrt(MU2[name])
    return np.prod(s * RAW[name](s * z), axis=-1)


def reference_density(points, data, H, kernel="gaussian", weights=None, kernel_fn=None):
    """sum_i w_i |H|^{-1/2} K(L^{-1}(x - X_i)) by an explicit loop over i."""
    points = np.atleast_2d(points)
    n, d = data.shape
    w = np.full(n, 1 / n) if weights is None else np.asarray(weights) / np.sum(weights)
    L = np.linalg.cholesky(H)
    Linv = np.linalg.inv(L)
    det = np.sqrt(np.linalg.det(H))
    out = np.zeros(points.shape[0])
    fn = kernel_fn or (lambda z: unit_product_kernel(kernel, z))
    for i in range(n):
        z = (points - data[i]) @ Linv.T
        out += w[i] * fn(z)
    return out / det


def radial_epanechnikov_unit(d):
    """Spherical Epanechnikov with unit covariance: (d+2)/(2 c_d) (1 - |x|^2) scaled by s^2 = 1/(d+4)."""
    cd = math.pi ** (d / 2) / special.gamma(d / 2 + 1)
    s = math.sqrt(1 / (d + 4))

    def fn(z):
        r2 = np.sum((s * z) ** 2, axis=-1)
        return s ** d * np.where(r2 <= 1, (d + 2) / (2 * cd) * (1 - r2), 0.0)

    return fn


def radial_unit(name, d):
    """Spherical form of any textbook kernel with unit covariance, constants by quadrature."""
    from scipy import integrate

    prof = lambda r: RAW[name](np.asarray(r, dtype=float)) / RAW[name](np.zeros(1))[0]  # noqa: E731
    area = d * math.pi ** (d / 2) / special.gamma(d / 2 + 1)
    top = 1.0 if name != "gaussian" else 40.0
    m0 = integrate.quad(lambda r: r ** (d - 1) * prof(r), 0, top, limit=200)[0]
    m2 = integrate.quad(lambda r: r ** (d + 1) * prof(r), 0, top, limit=200)[0]
    c = 1.0 / (area * m0)
    s = math.sqrt(m2 / m0 / d)  # per-coordinate sd of the raw radial kernel

    def fn(z):
        r = np.sqrt(np.sum(z ** 2, axis=-1)) * s
        return s ** d * c * prof(r)

    return fn
